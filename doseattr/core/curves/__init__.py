"""Relative-risk curves: models, fitting to category-level estimates, the
covariance of those estimates, and curves entered as published.

``effective_counts`` is not re-exported here: the function would shadow its
module of the same name; import it from
:mod:`doseattr.core.curves.effective_counts`.
"""

from doseattr.core.curves.base import Curve, CurveFit, CurveModel, Growth
from doseattr.core.curves.covariance import (
                                             LogRRCovariance,
                                             greenland_longnecker,
                                             independent_covariance,
                                             var_log_rr_from_ci,
)
from doseattr.core.curves.doses import BandDoses, assign_doses, band_mean_doses, distribution_doses
from doseattr.core.curves.fit import fit_curve
from doseattr.core.curves.points import curve_from_draws, points_curve
from doseattr.core.curves.published import entered_curve, published_curve
from doseattr.core.curves.registry import MODELS, make_model, model_names
from doseattr.core.curves.spline import default_knots, nonlinearity_test

__all__ = [
                                             "MODELS",
                                             "BandDoses",
                                             "Curve",
                                             "CurveFit",
                                             "CurveModel",
                                             "Growth",
                                             "LogRRCovariance",
                                             "assign_doses",
                                             "band_mean_doses",
                                             "curve_from_draws",
                                             "default_knots",
                                             "distribution_doses",
                                             "entered_curve",
                                             "fit_curve",
                                             "greenland_longnecker",
                                             "independent_covariance",
                                             "make_model",
                                             "model_names",
                                             "nonlinearity_test",
                                             "points_curve",
                                             "published_curve",
                                             "var_log_rr_from_ci",
]
