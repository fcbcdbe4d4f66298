r"""Warnings for results that mislead: fractions out of their plausible
range, an exposure on another scale than the curve, comparisons that
disagree, and a PAF that rests on extrapolation.

Each check is a pure function of the finished point results and returns
warning texts (one sentence each: what was found, the likely cause, what to
check). None changes a result. With minimum-risk level :math:`m` the
fractions are those of :mod:`doseattr.analysis.pipeline`,
:math:`RR_m(x) = RR(\max(x, m))/RR(m)` and :math:`PAF = 1 - 1/E[RR_m(X)]`.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from doseattr.core.attribution.contribution import Contribution
from doseattr.core.curves.base import Curve
from doseattr.core.curves.pooling import Pooled
from doseattr.core.exposure.empirical import EmpiricalExposure
from doseattr.results.records import AnyExposure, CurveVariant, ExposureVariant, ScenarioResult

#: A PAF or PIF above this is implausibly close to 1.
FRACTION_HIGH = 0.99
#: An exposure median more than this factor outside the curve's data range.
SCALE_FACTOR = 10.0
#: Comparison PAFs whose largest exceeds their smallest by more than this
#: ratio (4/3: they differ by more than a third of the smaller).
COMPARISON_RATIO = 4.0 / 3.0
#: A share of the PAF above the highest dose with data larger than this.
EXTRAPOLATED_SHARE = 0.5


def result_alarms(curve: Curve, exposure: AnyExposure, minimum_risk: float, unit: str, *,
                  paf: float, scenarios: Sequence[ScenarioResult],
                  model_comparison: Sequence[CurveVariant] = (),
                  dose_sensitivity: Sequence[CurveVariant] = (),
                  exposure_comparison: Sequence[ExposureVariant] = (),
                  contribution: Contribution | None = None) -> list[str]:
    """Every warning of this module for one analysis's point results."""
    out = fraction_alarms("the PAF", paf, curve, exposure, minimum_risk, unit)
    for s in scenarios:
        out += fraction_alarms(f"scenario '{s.name}' has a PIF that", s.pif.estimate, curve,
                               exposure, minimum_risk, unit)
    out += scale_alarms(curve, exposure, unit)
    out += comparison_alarms("model comparison", "model",
                             [(v.label, v.paf) for v in model_comparison])
    out += comparison_alarms("dose-assignment sensitivity", "dose rule",
                             [(v.label, v.paf) for v in dose_sensitivity])
    out += comparison_alarms("exposure family comparison", "exposure family",
                             [(v.label, v.paf) for v in exposure_comparison])
    if contribution is not None:
        out += extrapolation_alarms(contribution, curve, exposure, unit)
    return out


# -- a fraction out of its plausible range ------------------------------------------
def fraction_alarms(what: str, value: float, curve: Curve, exposure: AnyExposure,
                    minimum_risk: float, unit: str) -> list[str]:
    r"""A fraction below 0 or above :data:`FRACTION_HIGH`, with its likely cause.

    Below 0, :math:`E[RR_m(X)] < 1`, which needs :math:`RR_m < 1` somewhere
    above :math:`m`: the curve dips below its value at the minimum-risk
    level (a J-shape). Above 0.99, :math:`E[RR_m(X)] > 100`: the RR over
    the exposure range is implausibly large, most often a dose unit or a
    ``per`` increment off by a large factor.
    """
    if not np.isfinite(value) or 0.0 <= value <= FRACTION_HIGH:
        return []
    shown = f"{what} is {100 * value:.3g}%"
    if value < 0:
        return [shown + " (below 0): " + _dip(curve, exposure, minimum_risk, unit)]
    median = exposure_quantile(exposure, 0.5)
    lr = _log_rr_m(curve, np.array([median]), minimum_risk)[0]
    return [f"{shown} (above {FRACTION_HIGH:g}): the curve gives an RR of {_rr_text(lr)} at the "
            f"exposure's median {median:.3g} {unit}, implausibly large for the exposure range; "
            "check the unit and the `per` of the curve and the unit of the exposure"]


def _dip(curve: Curve, exposure: AnyExposure, m: float, unit: str) -> str:
    """Where the curve falls lowest below its value at ``m`` (on a grid
    from ``m`` to the larger of the data range and the exposure's 99th
    percentile)."""
    top = max(curve.data_max or 0.0, exposure_quantile(exposure, 0.99), m)
    grid = np.linspace(m, top, 401) if top > m else np.array([m])
    lr = _log_rr_m(curve, grid, m)
    i = int(np.argmin(lr))
    if lr[i] >= 0:
        return ("the curve does not fall below its value at the minimum-risk level on the "
                "exposure range, so the negative value is unexpected; check the curve's "
                "coefficients and the minimum-risk level")
    return (f"the curve falls below RR 1 above the minimum-risk level {m:g} {unit} (lowest RR "
            f"{np.exp(lr[i]):.3g} at {grid[i]:.3g} {unit}, a J-shape), so exposure there counts "
            f"as protective; check whether [attribution] minimum_risk should be set at the "
            f"curve's minimum ({grid[i]:.3g} {unit})")


def _log_rr_m(curve: Curve, x: np.ndarray, m: float) -> np.ndarray:
    return np.asarray(curve.log_rr(np.maximum(x, m)) - curve.log_rr(np.array([m])), dtype=float)


def _rr_text(log_rr: float) -> str:
    return f"{np.exp(log_rr):.3g}" if log_rr < 700 else f"exp({log_rr:.4g})"


# -- exposure on another scale than the curve ---------------------------------------
def scale_alarms(curve: Curve, exposure: AnyExposure, unit: str) -> list[str]:
    """The exposed population's median above ``SCALE_FACTOR`` x the highest
    dose with data, or below the lowest dose with data / ``SCALE_FACTOR``.

    The lowest dose with data is the smallest positive dose the curve's fit
    used (its bands' doses and the reference band's dose); curves that were
    not fitted to bands have no lower limit. A median that far outside is
    most often a unit read wrongly (mg/m3 as ug/m3 moves it 1000-fold)."""
    if curve.data_max is None:
        return []
    median = exposure_quantile(exposure, 0.5)
    low = data_min(curve)
    if median > SCALE_FACTOR * curve.data_max:
        where = f"more than {SCALE_FACTOR:g} times the highest dose with data ({curve.data_max:g} {unit})"
    elif low is not None and median < low / SCALE_FACTOR:
        where = f"less than 1/{SCALE_FACTOR:g} of the lowest dose with data ({low:g} {unit})"
    else:
        return []
    return [f"the exposure's median {median:.3g} {unit} is {where}, so the exposure and the "
            "curve are probably on different scales; check the units of the measurements and "
            "of the curve"]


def data_min(curve: Curve) -> float | None:
    """The smallest positive dose of a curve fitted to bands, else ``None``."""
    if curve.fit is None:
        return None
    doses = np.append(np.asarray(curve.fit.doses, dtype=float), curve.model.reference_dose)
    doses = doses[doses > 0]
    return float(doses.min()) if doses.size else None


def exposure_quantile(exposure: AnyExposure, q: float) -> float:
    """Quantile ``q`` of the exposed population: the family's, or for
    weighted values the smallest positive value whose weighted CDF among
    the positive values reaches ``q``."""
    if isinstance(exposure, EmpiricalExposure):
        keep = exposure.values > 0
        if not keep.any():
            return 0.0
        order = np.argsort(exposure.values[keep], kind="stable")
        x, w = exposure.values[keep][order], exposure.weights[keep][order]
        cum = np.cumsum(w) / w.sum()
        return float(x[min(int(np.searchsorted(cum, q)), x.size - 1)])
    return float(np.asarray(exposure.family.ppf(np.array([q]), exposure.params)).reshape(-1)[0])


# -- comparisons that disagree ------------------------------------------------------
def comparison_alarms(name: str, kind: str,
                      pafs: Sequence[tuple[str, float | None]]) -> list[str]:
    r"""PAFs of one comparison that differ by more than a third.

    The rule is :math:`\max - \min > \min_i |PAF_i| / 3` over the variants
    that could be computed; for positive PAFs this is
    :math:`\max/\min > 4/3`, and PAFs of opposite sign always meet it.
    """
    done = [(label, float(v)) for label, v in pafs if v is not None and np.isfinite(v)]
    if len(done) < 2:
        return []
    lo = min(done, key=lambda t: t[1])
    hi = max(done, key=lambda t: t[1])
    smallest = min(abs(v) for _, v in done)
    if not hi[1] - lo[1] > (COMPARISON_RATIO - 1) * smallest:
        return []
    return [f"the {name}'s PAFs range from {100 * lo[1]:.3g}% ({lo[0]}) to {100 * hi[1]:.3g}% "
            f"({hi[0]}), differing by more than a third, so the choice of {kind} matters; "
            "report the comparison beside the main result"]


# -- a PAF resting on extrapolation -------------------------------------------------
def extrapolation_alarms(contribution: Contribution, curve: Curve, exposure: AnyExposure,
                         unit: str) -> list[str]:
    r"""More than :data:`EXTRAPOLATED_SHARE` of the PAF from exposures above
    the highest dose with data: :math:`1 - C(d_{max}) > 0.5` with :math:`C`
    the cumulative share of the burden
    (:func:`~doseattr.core.attribution.contribution.burden_density`).

    :math:`C` is a step function over weighted values and is interpolated
    on the grid of a fitted distribution; a ``data_max`` beyond that grid
    (the exposed population's 99.9th percentile) is not checked. A PAF of
    0 or less has no share to speak of. On the grid the share is accurate
    to about the change of :math:`C` between two grid points, hence
    "about" in the text.
    """
    d = curve.data_max
    x, cum = contribution.x, contribution.cumulative
    if d is None or not contribution.paf > 0 or x.size == 0:
        return []
    if isinstance(exposure, EmpiricalExposure):
        i = int(np.searchsorted(x, d, side="right")) - 1
        below = float(cum[i]) if i >= 0 else 0.0
    elif d >= x[-1]:
        return []
    else:
        below = float(np.interp(d, x, cum))
    share = 1.0 - below
    if not share > EXTRAPOLATED_SHARE:
        return []
    return [f"about {100 * share:.3g}% of the PAF comes from exposures above {d:g} {unit}, the highest "
            "dose with data, so the result rests on extrapolation of the curve; check how the "
            "curve is extended there (beyond, max_dose) and report the result as an "
            "extrapolation"]


#: I^2 above this: most of the spread between studies is heterogeneity
#: (Higgins et al. 2003, BMJ 327:557, call 75% high; from memory).
HIGH_I2 = 0.75
#: One study carrying more than this share of a pooled estimate.
DOMINANT_WEIGHT = 0.60


def pooling_alarms(pooled: Pooled, predict: bool = False) -> list[str]:
    """High heterogeneity between pooled studies, and one study that
    carries most of the pooled estimate (``predict``: the Monte Carlo
    already draws a new population's curve)."""
    out = []
    if pooled.i2 > HIGH_I2:
        advice = "" if predict else ", and consider predict = true"
        out.append(f"the pooled studies disagree: I^2 = {pooled.i2:.0%} (above "
                   f"{HIGH_I2:.0%}) of the variation between their coefficients is "
                   "heterogeneity rather than chance; one pooled curve may describe none of "
                   f"their populations well (look at the studies' curves{advice})")
    top = int(np.argmax(pooled.weights))
    if pooled.weights[top] > DOMINANT_WEIGHT:
        out.append(f"study '{pooled.names[top]}' carries {pooled.weights[top]:.0%} of the "
                   f"pooled estimate (more than {DOMINANT_WEIGHT:.0%}): the pooled curve is "
                   "mostly that study's")
    return out
