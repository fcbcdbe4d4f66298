"""Goodness of fit of an exposure distribution fitted to measurements.

``goodness_of_fit`` runs the Kolmogorov-Smirnov test (``scipy.stats.kstest``)
on the detected values. Its p-value assumes the distribution was known in
advance; with parameters estimated from the same data it is too large, so
the test is conservative (Lilliefors 1967, J Am Stat Assoc 62:399, from
memory). With one detection limit below every detect, the detects are
compared with the fitted distribution conditional on exceeding the limit;
with several limits, or unequal weights, the statistic is the probability
plot correlation coefficient (PPCC) of the detected values against the
fitted quantiles at their ROS plotting positions, on the log scale: the
correlation in the Q-Q plot (Filliben 1975, Technometrics 17:111; used with
censored-data plotting positions by Helsel 2012, ch. 9; both from memory).
It has no p-value here (its null distribution with censoring and estimated
parameters is not tabulated); values near 1 mean a straight Q-Q plot.
Hand-written: scipy's ``ppcc_plot``/``probplot`` take no censoring.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from doseattr.core.exposure.base import Exposure, FloatArray
from doseattr.core.exposure.nondetects import ros_plotting_positions
from doseattr.errors import ModelError

_NOTE = ("p-value approximate: parameters were estimated from the same data, "
         "which makes the test conservative")


def _measured(exposure: Exposure) -> tuple[FloatArray, NDArray[np.bool_], FloatArray | None]:
    fit = exposure.fit
    if fit is None or fit.values is None or fit.detected_mask is None:
        raise ModelError("this exposure distribution was not fitted to measurements")
    return fit.values, fit.detected_mask, fit.weights


def _skipped(reason: str) -> dict[str, Any]:
    return {"test": None, "statistic": None, "p_value": None, "n": 0, "note": f"not computed: {reason}"}


def goodness_of_fit(exposure: Exposure) -> dict[str, Any]:
    """Kolmogorov-Smirnov test of the detected values (module docstring).

    Returns a dict with ``test``, ``statistic``, ``p_value``, ``n`` and
    ``note`` (``test`` is ``None`` when no test applies, with the reason).
    """
    x, d, w = _measured(exposure)
    if w is not None and not np.allclose(w, w[0]):
        return probability_plot_correlation(exposure, "weighted data (positions unweighted)")
    from scipy import stats  # here: the PPCC above needs no scipy.stats (start-up time)

    dist = exposure.family.scipy(exposure.params)
    cdf, note = dist.cdf, _NOTE
    if not d.all():
        limits = np.unique(x[~d])
        if limits.size > 1 or np.any(x[d] < limits[0]):
            return probability_plot_correlation(exposure, "several detection limits")
        low, above = dist.cdf(limits[0]), dist.sf(limits[0])
        cdf = lambda v: (dist.cdf(v) - low) / above  # noqa: E731
        note = f"detects compared with the fit conditional on exceeding {limits[0]:g}; {_NOTE}"
    res = stats.kstest(x[d], cdf)
    return {"test": "Kolmogorov-Smirnov", "statistic": float(res.statistic),
            "p_value": float(res.pvalue), "n": int(d.sum()), "note": note}


def probability_plot_correlation(exposure: Exposure, why: str) -> dict[str, Any]:
    r"""PPCC: Pearson correlation of :math:`\ln x_i` with
    :math:`\ln F^{-1}(p_i)` over the detected values, :math:`p_i` their ROS
    plotting positions (module docstring)."""
    theoretical, observed, detected = qq_points(exposure)
    if detected.sum() < 3:
        return _skipped("fewer than 3 detected values")
    r = float(np.corrcoef(np.log(theoretical[detected]), np.log(observed[detected]))[0, 1])
    return {"test": "probability plot correlation", "statistic": r, "p_value": None,
            "n": int(detected.sum()),
            "note": f"{why}: correlation of the Q-Q plot (ROS plotting positions, log scale); "
                    "no p-value; values near 1 mean a close fit"}


def qq_points(exposure: Exposure) -> tuple[FloatArray, FloatArray, NDArray[np.bool_]]:
    """Points of a Q-Q plot for a fit to (possibly censored) measurements.

    Returns ``(theoretical, observed, detected)`` sorted by plotting
    position: the fitted quantile at each value's ROS plotting position
    (:func:`ros_plotting_positions`), the value (a detection limit where
    ``detected`` is false), and the detection mask. Weights are not used.
    """
    x, d, _ = _measured(exposure)
    pos = ros_plotting_positions(x, d)
    order = np.argsort(pos, kind="stable")
    theoretical = exposure.family.ppf(pos[order], exposure.params)
    return theoretical, x[order], d[order]
