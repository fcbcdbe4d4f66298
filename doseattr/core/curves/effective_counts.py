"""Hamling et al. (2008) effective counts: covariance from RRs and CIs alone.

Hamling et al. (2008), Stat Med 27:954 (details of the paper from memory). When a table
gives only ratios and confidence intervals, find pseudo-counts whose crude
ratios equal the reported ones and whose Woolf variances equal the reported
ones; their shared reference cells give the covariance. The two extra
conditions that pin the counts down are the overall ratio of cases to
non-cases and the share of the reference band (from memory of the paper;
the defaults below are this project's assumptions and are reported).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Literal, cast

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import brentq
from scipy.special import expit

from doseattr.core.curves.base import FloatArray
from doseattr.core.curves.covariance import LogRRCovariance, independent_covariance
from doseattr.errors import ModelError

#: Bracket for the logit-scale unknowns (expit(+-60) is 1e-26 from the ends).
BRACKET = 60.0


def effective_counts(rr: ArrayLike, var_log_rr: ArrayLike, *, ref: int,
                     design: Literal["case-control", "incidence-rate",
                                     "cumulative-incidence"] = "case-control",
                     case_ratio: float | None = None, reference_share: float | None = None,
                     fallback: bool = True) -> LogRRCovariance:
    r"""Covariance of log RRs from effective counts (Hamling et al. 2008).

    Case-control (odds ratios), unknown reference cells :math:`A_0, B_0`:
    with :math:`c = 1/A_0 + 1/B_0` and :math:`q = A_0/B_0`, each band's cells
    follow from :math:`OR_i = A_i B_0 / (A_0 B_i)` and
    :math:`v_i = 1/A_i + 1/B_i + c`:

    .. math:: B_i = \frac{1 + 1/(OR_i\,q)}{v_i - c}, \quad A_i = OR_i\,q\,B_i,
              \quad A_0 = \frac{1 + q}{c}, \quad B_0 = \frac{1 + q}{c\,q}

    and :math:`(c, q)` solve :math:`B_0/\sum B = s_0` (``reference_share``)
    and :math:`\sum A / \sum B = R` (``case_ratio``); the covariance is
    :math:`c` off the diagonal. Incidence rate: :math:`v_i = 1/A_i + 1/A_0`,
    :math:`A_i = 1/(v_i - 1/A_0)`, :math:`A_0/\sum A = s_0`, covariance
    :math:`1/A_0`. Cumulative incidence (risk ratios) is treated as incidence
    rate: the binomial shared term :math:`1/A_0 - 1/N_0` needs the group sizes,
    which the ratios and CIs do not give, so the covariance is overstated by
    :math:`1/N_0` (a rare-disease approximation, noted in the result).

    Defaults (assumptions, noted in the result): ``case_ratio`` 1 and
    ``reference_share`` 1/B (B bands). If no counts exist, returns the
    independent covariance with a note (``fallback=True``) or raises
    :class:`ModelError`.

    Parameters
    ----------
    rr, var_log_rr
        Over all bands ``(B,)`` in table order; the reference band
        (``ref``) has RR 1 and its variance is ignored.
    """
    rr, var = _validate(rr, var_log_rr, ref)
    solved, case_ratio, share, notes = _assumptions(design, rr.size, case_ratio,
                                                    reference_share)
    others = np.delete(np.arange(rr.size), ref)
    try:
        if solved == "case-control":
            assert case_ratio is not None  # _assumptions sets it for case-control
            a, b, shared = _case_control(rr[others], var[others], share, case_ratio)
        else:
            a, b, shared = _incidence_rate(rr[others], var[others], share)
    except ModelError as err:
        if not fallback:
            raise
        return LogRRCovariance(independent_covariance(var[others]).cov, "independent",
                               notes=(f"effective counts failed ({err}); log RRs treated as "
                                      f"independent",))
    cov = np.full((others.size, others.size), shared)
    np.fill_diagonal(cov, var[others])
    return LogRRCovariance(cov, "effective-counts", pseudo_cases=_in_table_order(a, ref),
                           pseudo_totals=_in_table_order(b, ref), notes=notes)


def _assumptions(design: str, bands: int, case_ratio: float | None,
                 share: float | None) -> tuple[str, float | None, float, tuple[str, ...]]:
    """Design actually solved, the two side conditions, and notes on defaults."""
    if design not in ("case-control", "incidence-rate", "cumulative-incidence"):
        raise ModelError(f"effective counts support 'case-control', 'incidence-rate' and "
                         f"'cumulative-incidence', not {design!r}")
    notes = []
    if design == "cumulative-incidence":
        design = "incidence-rate"
        notes.append("risk ratios treated like rate ratios for the effective counts "
                     "(rare-disease approximation; slightly overstates the covariance)")
    if share is None:
        share = 1.0 / bands
        who = "non-cases" if design == "case-control" else "cases"
        notes.append(f"effective counts assume the reference band holds 1/{bands} of the {who}")
    if design == "case-control" and case_ratio is None:
        case_ratio = 1.0
        notes.append("effective counts assume as many cases as non-cases")
    if not 0 < share < 1:
        raise ModelError(f"reference_share must lie between 0 and 1, got {share}")
    if case_ratio is not None and not (np.isfinite(case_ratio) and case_ratio > 0):
        raise ModelError(f"case_ratio must be positive, got {case_ratio}")
    return design, case_ratio, share, tuple(notes)


def _case_control(rr: FloatArray, v: FloatArray, share: float,
                  ratio: float) -> tuple[FloatArray, FloatArray, float]:
    """Nested root finding: for each q the share fixes c (monotone), then q
    solves the case ratio. Returns cells with the reference first."""
    vmin = v.min()

    def cells(s: float, q: float) -> tuple[FloatArray, FloatArray, float]:
        c = vmin * expit(s)
        gap = (v - vmin) + vmin * expit(-s)        # v_i - c without cancellation
        b = np.r_[(1.0 + q) / (c * q), (1.0 + 1.0 / (rr * q)) / gap]
        a = np.r_[(1.0 + q) / c, rr * q * b[1:]]
        return a, b, c

    def share_gap(s: float, q: float) -> float:
        _, b, _ = cells(s, q)
        return float(np.log(b[0] / b.sum()) - np.log(share))

    def solve_c(q: float) -> float:
        return _root(lambda s: share_gap(s, q), "reference share")

    def ratio_gap(log_q: float) -> float:
        q = np.exp(log_q)
        a, b, _ = cells(solve_c(q), q)
        return float(np.log(a.sum() / b.sum()) - np.log(ratio))

    q = np.exp(_root(ratio_gap, "case ratio", bracket=np.log(ratio) + np.array([-30.0, 30.0])))
    return cells(solve_c(q), q)


def _incidence_rate(rr: FloatArray, v: FloatArray,
                    share: float) -> tuple[FloatArray, FloatArray, float]:
    """``1/A_0 = vmin expit(s)``; the share of cases in the reference band
    falls from 1 to 0 as ``s`` grows. Person-time in units making the
    reference rate 1."""
    vmin = v.min()

    def cases(s: float) -> FloatArray:
        gap = (v - vmin) + vmin * expit(-s)
        return cast(FloatArray, np.r_[1.0 / (vmin * expit(s)), 1.0 / gap])

    s = _root(lambda s: float(np.log(cases(s)[0] / cases(s).sum()) - np.log(share)),
              "reference share")
    a = cases(s)
    return a, cast(FloatArray, a / np.r_[1.0, rr]), cast(float, 1.0 / a[0])


def _root(f: Callable[[float], float], what: str,
          bracket: tuple[float, float] | FloatArray = (-BRACKET, BRACKET)) -> float:
    lo, hi = (float(b) for b in bracket)
    f_lo, f_hi = f(lo), f(hi)
    if not (np.isfinite(f_lo) and np.isfinite(f_hi)) or f_lo * f_hi > 0:
        raise ModelError(f"no effective counts reproduce the {what}")
    return cast(float, brentq(f, lo, hi, xtol=1e-13, rtol=4 * np.finfo(float).eps, maxiter=500))


def _in_table_order(cells: FloatArray, ref: int) -> FloatArray:
    """Reference-first cells back into table order."""
    return np.insert(cells[1:], ref, cells[0])


def _validate(rr: ArrayLike, var: ArrayLike, ref: int) -> tuple[FloatArray, FloatArray]:
    rr = np.atleast_1d(np.asarray(rr, dtype=float))
    var = np.atleast_1d(np.asarray(var, dtype=float))
    if rr.ndim != 1 or rr.shape != var.shape or rr.size < 2 or not 0 <= ref < rr.size:
        raise ModelError("rr and var_log_rr must be 1-D, of equal length, with a reference band")
    if not np.all(np.isfinite(rr) & (rr > 0)) or not np.isclose(rr[ref], 1.0, atol=1e-12):
        raise ModelError("RRs must be positive and the reference band's RR must be 1")
    others = np.delete(var, ref)
    if not np.all(np.isfinite(others) & (others > 0)):
        raise ModelError("variances of log RR must be positive numbers")
    return rr, var
