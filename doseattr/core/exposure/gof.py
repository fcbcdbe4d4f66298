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

from typing import Any, cast

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


def goodness_of_fit(exposure: Exposure, *, order: NDArray[np.intp] | None = None
                    ) -> dict[str, Any]:
    """Kolmogorov-Smirnov test of the detected values (module docstring).

    ``order``, when the caller has it, is a stable ascending order of the
    fit's values (``np.argsort(values, kind="stable")``), so that several
    fits to the same values sort them once.

    Returns a dict with ``test``, ``statistic``, ``p_value``, ``n`` and
    ``note`` (``test`` is ``None`` when no test applies, with the reason).
    """
    x, d, w = _measured(exposure)
    if w is not None and not np.allclose(w, w[0]):
        return probability_plot_correlation(exposure, "weighted data (positions unweighted)",
                                            order=order)
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


def probability_plot_correlation(exposure: Exposure, why: str, *,
                                 order: NDArray[np.intp] | None = None) -> dict[str, Any]:
    r"""PPCC: Pearson correlation of :math:`\ln x_i` with
    :math:`\ln F^{-1}(p_i)` over the detected values, :math:`p_i` their ROS
    plotting positions (module docstring).

    With more than :data:`EXACT_UP_TO` positions the log quantiles come from
    :func:`log_quantiles`' interpolant, accepted only when its estimated
    error moves the correlation by less than :data:`PPCC_TOLERANCE`
    (bound there); otherwise, and below that size, the quantile function
    is evaluated at every position."""
    log_theoretical, observed, detected = _log_qq(exposure, order)
    if detected.sum() < 3:
        return _skipped("fewer than 3 detected values")
    r = float(np.corrcoef(log_theoretical[detected], np.log(observed[detected]))[0, 1])
    return {"test": "probability plot correlation", "statistic": r, "p_value": None,
            "n": int(detected.sum()),
            "note": f"{why}: correlation of the Q-Q plot (ROS plotting positions, log scale); "
                    "no p-value; values near 1 mean a close fit"}


def qq_points(exposure: Exposure, *, order: NDArray[np.intp] | None = None
              ) -> tuple[FloatArray, FloatArray, NDArray[np.bool_]]:
    """Points of a Q-Q plot for a fit to (possibly censored) measurements.

    Returns ``(theoretical, observed, detected)`` sorted by plotting
    position: the fitted quantile at each value's ROS plotting position
    (:func:`ros_plotting_positions`), the value (a detection limit where
    ``detected`` is false), and the detection mask. Weights are not used.
    ``order``: as for :func:`goodness_of_fit`. Above :data:`EXACT_UP_TO`
    points the quantiles are :func:`log_quantiles`' (relative error within
    :data:`PPCC_TOLERANCE`).
    """
    log_theoretical, observed, detected = _log_qq(exposure, order)
    return np.exp(log_theoretical), observed, detected


def _log_qq(exposure: Exposure, order: NDArray[np.intp] | None
            ) -> tuple[FloatArray, FloatArray, NDArray[np.bool_]]:
    """:func:`qq_points` with the theoretical quantiles on the log scale."""
    x, d, _ = _measured(exposure)
    if d.all():
        # ros_plotting_positions without censoring: rank / (n + 1), the
        # ranks in stable order of the values, so sorting by position is
        # sorting the values
        order = np.argsort(x, kind="stable") if order is None else order
        pos = np.arange(1.0, x.size + 1.0) / (x.size + 1.0)
    else:
        pos = ros_plotting_positions(x, d)
        order = np.argsort(pos, kind="stable")
        pos = pos[order]
    return log_quantiles(exposure, pos), x[order], d[order]


#: Up to this many positions the quantile function is evaluated at each.
EXACT_UP_TO = 20_000
#: Nodes of the interpolant of :func:`log_quantiles`.
NODES = 4096
#: Largest accepted bound on the interpolant's effect on the PPCC.
PPCC_TOLERANCE = 1e-10
#: Families whose quantile function is a closed form in elementary
#: functions and ``ndtri``, as cheap as the interpolant: always exact.
CLOSED_FORM_PPF = frozenset({"lognormal", "weibull"})


def log_quantiles(exposure: Exposure, p: FloatArray) -> FloatArray:
    r""":math:`\ln F^{-1}(p)` of the fitted family at the positions ``p``.

    Up to :data:`EXACT_UP_TO` positions, and for the families of
    :data:`CLOSED_FORM_PPF`, the family's ``ppf`` at each. Beyond (the
    gamma: an inverse incomplete gamma function per position),
    :math:`g(z) = \ln F^{-1}(\Phi(z))` is interpolated in the normal score
    :math:`z = \Phi^{-1}(p)` through :data:`NODES` equally spaced exact
    nodes over the range of :math:`z`, by the cubic through the four
    nearest nodes (:func:`_cubic`): :math:`g` is linear for the lognormal
    and smooth for the other families, and the cubic's error is
    :math:`|g^{(4)}(\xi)|\,h^4 |(t+1)t(t-1)(t-2)|/24` (Lagrange remainder,
    closed form), :math:`t` the position between nodes in steps :math:`h`.
    Its largest error :math:`\hat\varepsilon` is estimated against the
    exact ``ppf`` at a quarter, half and three quarters of every step
    (where the remainder's polynomial peaks; an estimate, not a proof, so
    twice it is used below).

    Bound on the PPCC (closed form): changing the vector :math:`t` of log
    quantiles by :math:`\delta` with :math:`|\delta_i| \le \varepsilon`
    turns the centred vector by an angle :math:`\theta` with
    :math:`\sin\theta \le \|\delta\| / \|\tilde t\| \le
    \varepsilon / s_t` (:math:`s_t` the standard deviation of :math:`t`),
    and the correlation, the cosine of the angle between the centred
    vectors, moves by at most :math:`\theta \le (\pi/2)\,\varepsilon/s_t`.
    The interpolant is used only when
    :math:`(\pi/2)\,2\hat\varepsilon/s_t \le` :data:`PPCC_TOLERANCE`
    (and every node is finite); otherwise every position is evaluated.
    """
    from scipy.special import ndtr, ndtri

    params = exposure.params

    def exact(q: FloatArray) -> FloatArray:
        return np.asarray(np.log(exposure.family.ppf(q, params)), dtype=float)

    p = np.asarray(p, dtype=float)
    if p.size <= EXACT_UP_TO or exposure.family.name in CLOSED_FORM_PPF:
        return exact(p)
    z = ndtri(p)
    if not np.all(np.isfinite(z)):
        return exact(p)
    lo, hi = float(z.min()), float(z.max())
    step = (hi - lo) / (NODES - 1)
    at_nodes = exact(ndtr(lo + step * np.arange(NODES)))
    if not (step > 0 and np.all(np.isfinite(at_nodes))):
        return exact(p)
    checks = lo + step * (np.arange(NODES - 1)[:, None] + np.array([0.25, 0.5, 0.75])).ravel()
    error = float(np.max(np.abs(_cubic(at_nodes, lo, step, checks) - exact(ndtr(checks)))))
    t = _cubic(at_nodes, lo, step, z)
    spread = float(np.std(t))
    if not (np.isfinite(error) and spread > 0
            and 0.5 * np.pi * 2.0 * error <= PPCC_TOLERANCE * spread):
        return exact(p)
    return t


def _cubic(values: FloatArray, start: float, step: float, z: FloatArray) -> FloatArray:
    """The cubic through the four nodes nearest ``z`` (the two end steps
    use the first or last four), nodes ``start + j step`` holding
    ``values``: Lagrange's formula at the offsets -1, 0, 1, 2."""
    s = (z - start) / step
    i = np.clip(np.floor(s).astype(np.intp), 1, values.size - 3)
    t = s - i
    a, b, c, d = (values[i + k] for k in (-1, 0, 1, 2))
    tm, tp, t2 = t - 1.0, t + 1.0, t - 2.0
    return cast(FloatArray, (-a * t * tm * t2 + d * tp * t * tm) / 6.0
                + (b * tp * tm * t2 - c * tp * t * t2) / 2.0)
