"""Covariance of category-level log relative risks.

Estimates for the non-reference bands of one study share the reference
group, so they are positively correlated. Greenland & Longnecker (1992,
Am J Epidemiol 135:1301) rebuild pseudo-counts that reproduce the reported
(adjusted) ratios and the observed margins, and take the covariance from
them; the reported variances stay on the diagonal. Hamling et al. (2008)
effective counts, for tables without counts, are in
:mod:`doseattr.core.curves.effective_counts`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import FloatArray
from doseattr.core.curves.logistic import expit
from doseattr.core.curves.roots import bisect_root
from doseattr.errors import ModelError

Design = Literal["case-control", "incidence-rate", "cumulative-incidence"]
DESIGNS: tuple[str, ...] = ("case-control", "incidence-rate", "cumulative-incidence")


@dataclass(frozen=True)
class LogRRCovariance:
    """Covariance of the non-reference log RRs of one study.

    Attributes
    ----------
    cov
        ``(n, n)`` over the non-reference bands, in table order.
    method
        ``"counts"`` (Greenland & Longnecker), ``"effective-counts"``
        (Hamling et al.) or ``"independent"`` (diagonal).
    pseudo_cases, pseudo_totals
        Reconstructed counts over all bands ``(B,)`` in table order
        (controls / non-cases, person-time or persons for the totals), or
        ``None``.
    notes
        Assumptions and fallbacks, for the report.
    """

    cov: FloatArray
    method: str
    pseudo_cases: FloatArray | None = None
    pseudo_totals: FloatArray | None = None
    notes: tuple[str, ...] = ()

    @property
    def variances(self) -> FloatArray:
        return np.diag(self.cov).copy()

    @property
    def correlation(self) -> FloatArray:
        sd = np.sqrt(self.variances)
        return cast(FloatArray, self.cov / np.outer(sd, sd))


def var_log_rr_from_ci(rr: ArrayLike, lo: ArrayLike, hi: ArrayLike,
                       level: float = 0.95) -> FloatArray:
    r"""Variance of log RR from a Wald confidence interval.

    .. math:: \operatorname{var}(\log RR) =
              \left(\frac{\log hi - \log lo}{2 z_{(1+level)/2}}\right)^2

    (common practice; the interval is assumed symmetric on the log scale).
    Raises :class:`ModelError` unless ``0 < lo < hi`` and ``lo <= rr <= hi``.
    """
    from scipy.special import ndtri  # scipy.stats.norm.ppf without scipy.stats

    rr, lo, hi = (np.asarray(v, dtype=float) for v in (rr, lo, hi))
    ok = np.isfinite(lo) & np.isfinite(hi) & (lo > 0) & (lo < hi) & (lo <= rr) & (rr <= hi)
    if not np.all(ok):
        bad = np.flatnonzero(np.ravel(~ok))[0]
        raise ModelError(
            f"confidence interval number {bad + 1} ({np.ravel(lo)[bad]:g} to "
            f"{np.ravel(hi)[bad]:g}, RR {np.ravel(rr)[bad]:g}) must satisfy 0 < lower < upper "
            f"with the RR inside it")
    z = ndtri(0.5 + level / 2.0)
    return cast(FloatArray, ((np.log(hi) - np.log(lo)) / (2.0 * z)) ** 2)


def independent_covariance(var_log_rr: ArrayLike) -> LogRRCovariance:
    """Diagonal covariance: estimates treated as independent.

    Ignores the shared reference group, which understates the slope's
    uncertainty (Greenland & Longnecker 1992).
    """
    v = np.atleast_1d(np.asarray(var_log_rr, dtype=float))
    _require_variances(v)
    return LogRRCovariance(np.diag(v), "independent",
                           notes=("log RRs treated as independent (no counts given)",))


def greenland_longnecker(rr: ArrayLike, var_log_rr: ArrayLike, cases: ArrayLike,
                         totals: ArrayLike, *, design: Design, ref: int) -> LogRRCovariance:
    r"""Covariance of log RRs from Greenland & Longnecker (1992) pseudo-counts.

    Pseudo-counts ``A_i`` (cases) reproduce the reported ratios and the
    observed margins; the covariance of two non-reference log RRs is the
    variance of the shared reference term:

    .. math::
        \operatorname{cov}(\log RR_i, \log RR_j) =
        \begin{cases}
        1/A_0 + 1/B_0 & \text{case-control (} B \text{ controls)}\\
        1/A_0 & \text{incidence rate}\\
        1/A_0 - 1/N_0 & \text{cumulative incidence}
        \end{cases}

    The diagonal is the reported ``var_log_rr``.

    Parameters
    ----------
    rr, var_log_rr, cases, totals
        Over all bands in table order ``(B,)``; ``totals`` holds controls
        (case-control), person-time (incidence rate) or persons (cumulative
        incidence). The reference band's ``rr`` must be 1; its variance is
        ignored.
    design
        One of ``DESIGNS``.
    ref
        Index of the reference band.
    """
    rr, var, cases, totals = _validate(rr, var_log_rr, cases, totals, ref)
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        # counts near 0 make 1/count inf; the positive-definiteness check refuses it
        return _greenland_longnecker(rr, var, cases, totals, design, ref)


def _greenland_longnecker(rr: FloatArray, var: FloatArray, cases: FloatArray, totals: FloatArray,
                          design: str, ref: int) -> LogRRCovariance:
    if design == "case-control":
        a, b = _case_control_counts(rr, cases, totals, ref)
        shared = 1.0 / a[ref] + 1.0 / b[ref]
    elif design == "incidence-rate":
        a, b = _proportional_counts(rr, cases, totals, ref, "person-time"), totals
        shared = 1.0 / a[ref]
    elif design == "cumulative-incidence":
        a, b = _cumulative_counts(rr, cases, totals, ref), totals
        shared = 1.0 / a[ref] - 1.0 / b[ref]
    else:
        raise ModelError(f"unknown study design {design!r}; use one of {', '.join(DESIGNS)}")
    cov = _shared_reference_cov(np.delete(var, ref), shared)
    return LogRRCovariance(cov, "counts", pseudo_cases=a, pseudo_totals=b,
                           notes=(f"Greenland-Longnecker pseudo-counts ({design})",))


def _shared_reference_cov(var: FloatArray, shared: float) -> FloatArray:
    """Matrix with ``shared`` off the diagonal and ``var`` on it; must be positive definite."""
    cov = np.full((var.size, var.size), shared)
    np.fill_diagonal(cov, var)
    try:
        np.linalg.cholesky(cov)
    except np.linalg.LinAlgError:
        raise ModelError(
            f"reconstructed covariance is not positive definite: the shared reference term "
            f"{shared:.4g} is too large for reported variances as small as {var.min():.4g}; "
            f"check the counts and CIs, or use independent estimates") from None
    return cov


def _case_control_counts(rr: FloatArray, cases: FloatArray, controls: FloatArray,
                         ref: int) -> tuple[FloatArray, FloatArray]:
    r"""Case-control pseudo-counts (Greenland & Longnecker 1992).

    Keep each band's total :math:`N_i = A_i + B_i` and the total of cases
    :math:`M_1`, with :math:`A_i/B_i = RR_i\,A_0/B_0`. Writing
    :math:`u = \log(A_0/B_0)`, :math:`A_i = N_i\,\operatorname{expit}(\log RR_i + u)`
    and the single unknown solves :math:`\sum_i A_i(u) = M_1`, increasing
    in ``u``. Bracket: :math:`\operatorname{expit}(s) < e^s` gives
    :math:`u \ge \log(M_1 / \sum N_i RR_i)`; :math:`1 - \operatorname{expit}(s) < e^{-s}`
    gives :math:`u \le \log(\sum (N_i/RR_i) / M_0)`.
    """
    n = cases + controls
    m1, m0 = cases.sum(), controls.sum()
    if m1 <= 0 or m0 <= 0 or n[ref] <= 0:
        raise ModelError(
            "case-control pseudo-counts need some cases and some controls overall and in "
            f"the reference band (cases {m1:g}, controls {m0:g}, reference total {n[ref]:g})")
    lrr = np.log(rr)

    def excess_cases(u: float) -> float:
        return float(np.sum(n * expit(lrr + u)) - m1)

    lo, hi = np.log(m1 / np.sum(n * rr)), np.log(np.sum(n / rr) / m0)
    u = bisect_root(excess_cases, lo, hi, xtol=1e-14, rtol=4 * np.finfo(float).eps)
    return n * expit(lrr + u), n * expit(-(lrr + u))


def _proportional_counts(rr: FloatArray, cases: FloatArray, size: FloatArray, ref: int,
                         what: str) -> FloatArray:
    r"""Pseudo-cases :math:`A_i = A_0 RR_i S_i / S_0` with :math:`\sum A_i = M_1`.

    Closed form :math:`A_i = M_1 RR_i S_i / \sum_j RR_j S_j` (Greenland &
    Longnecker 1992, incidence-rate and cumulative-incidence designs).
    """
    m1 = cases.sum()
    if m1 <= 0 or size[ref] <= 0:
        raise ModelError(
            f"pseudo-counts need some cases (got {m1:g}) and positive {what} in the "
            f"reference band (got {size[ref]:g})")
    weight = rr * size
    return cast(FloatArray, m1 * weight / weight.sum())


def _cumulative_counts(rr: FloatArray, cases: FloatArray, persons: FloatArray,
                       ref: int) -> FloatArray:
    """Cumulative-incidence pseudo-cases; each must stay below its band's persons."""
    a = _proportional_counts(rr, cases, persons, ref, "persons")
    over = np.flatnonzero((a >= persons) & (persons > 0))
    if over.size:
        i = over[0]
        raise ModelError(
            f"cumulative-incidence pseudo-counts do not exist: band {i + 1} would need "
            f"{a[i]:.4g} cases among {persons[i]:g} persons (risk >= 1); check that totals "
            f"are persons and the ratios are risk ratios")
    return a


def _validate(rr: ArrayLike, var: ArrayLike, cases: ArrayLike, totals: ArrayLike,
              ref: int) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    arrays = [np.atleast_1d(np.asarray(v, dtype=float)) for v in (rr, var, cases, totals)]
    size = arrays[0].size
    if any(a.shape != (size,) for a in arrays):
        raise ModelError("rr, var_log_rr, cases and totals must be 1-D and of equal length")
    if size < 2 or not 0 <= ref < size:
        raise ModelError(f"need a reference band and at least one other; ref={ref}, bands={size}")
    rr, var, cases, totals = arrays
    if not np.all(np.isfinite(rr) & (rr > 0)):
        raise ModelError("every RR must be a positive number")
    if not np.isclose(rr[ref], 1.0, rtol=0, atol=1e-12):
        raise ModelError(f"the reference band (band {ref + 1}) must have RR 1, got {rr[ref]:g}")
    _require_variances(np.delete(var, ref))
    if not np.all(np.isfinite(cases) & (cases >= 0) & np.isfinite(totals) & (totals >= 0)):
        raise ModelError("cases and totals must be non-negative numbers")
    return rr, var, cases, totals


def _require_variances(v: FloatArray) -> None:
    if not np.all(np.isfinite(v) & (v > 0)):
        raise ModelError(f"variances of log RR must be positive numbers, got {v}")
