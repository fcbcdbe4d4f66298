"""Hamling et al. (2008) effective counts: covariance from RRs and CIs alone.

Hamling et al. (2008), Stat Med 27:954 (details of the paper from memory). When a table
gives only ratios and confidence intervals, find pseudo-counts whose crude
ratios equal the reported ones and whose Woolf variances equal the reported
ones; their shared reference cells give the covariance. The two extra
conditions that pin the counts down are the overall ratio of cases to
non-cases and the share of the reference band (from memory of the paper).
When the table gives counts or totals, :func:`table_conditions` takes the two
conditions from them; the defaults are this project's assumptions, used only
for what the table does not give, and are reported.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Literal, cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import FloatArray
from doseattr.core.curves.covariance import LogRRCovariance, independent_covariance
from doseattr.core.curves.logistic import expit
from doseattr.core.curves.roots import bisect_root
from doseattr.errors import ModelError

Design = Literal["case-control", "incidence-rate", "cumulative-incidence"]
#: Whose share of the reference band is known: ``"cases"`` or ``"totals"``
#: (non-cases for case-control, person-time for incidence rate).
ShareOf = Literal["cases", "totals"]

#: Bracket for the logit-scale unknowns (expit(+-60) is 1e-26 from the ends).
BRACKET = 60.0


@dataclass(frozen=True)
class SideConditions:
    """The two conditions beside the RRs and CIs, and where they came from.

    ``case_ratio`` is total cases over total non-cases (case-control only);
    ``reference_share`` is the reference band's share of the cases or of the
    totals (``share_of``; ``None`` for the design's usual one); ``notes`` say which table totals were used.
    """

    case_ratio: float | None = None
    reference_share: float | None = None
    share_of: ShareOf | None = None
    notes: tuple[str, ...] = ()


def table_conditions(*, ref: int, design: Design = "case-control",
                     cases: ArrayLike | None = None, totals: ArrayLike | None = None,
                     total_cases: float | None = None,
                     total_noncases: float | None = None) -> SideConditions:
    r"""Side conditions from whatever counts or totals the table gives.

    Per band (table order, NaN where unknown): ``cases`` :math:`A_i` and
    ``totals`` :math:`B_i` (controls for case-control, person-time for
    incidence rate). Overall: ``total_cases`` :math:`\sum A`,
    ``total_noncases`` :math:`\sum B` (case-control); a sum over bands
    stands in for a missing overall total when every band is known.

    * case ratio :math:`R = \sum A / \sum B` (case-control, both totals known);
    * reference share :math:`B_0/\sum B` when the reference band's totals and
      their sum are known, else :math:`A_0/\sum A` from the cases (for
      incidence rate the cases' share first, then person-time's).

    These are the two conditions of Hamling et al. (2008, Stat Med 27:954;
    from memory). On a crude table (ratios and Woolf or Poisson variances
    from the counts) the counts solving them are the table's counts, so the
    covariance equals Greenland & Longnecker's (1992, Am J Epidemiol 135:1301).
    A condition nothing gives is left ``None`` (the defaults apply).
    """
    a = _optional(cases, "cases")
    b = _optional(totals, "totals")
    what = "controls" if design == "case-control" else "person-time"
    sum_a, from_a = _total(a, total_cases, "cases")
    sum_b, from_b = _total(b, total_noncases, what)
    notes: list[str] = []
    ratio = share = None
    share_of: ShareOf | None = None
    if design == "case-control" and sum_a is not None and sum_b is not None:
        ratio = sum_a / sum_b
        notes.append(f"effective counts take the case ratio {ratio:.4g} from the table's "
                     f"{from_a} and {from_b}")
    shares = [(b, sum_b, what, from_b, "totals"), (a, sum_a, "cases", from_a, "cases")]
    if design != "case-control":
        shares.reverse()     # the cases' share is the one the rate variances rest on
    for per_band, total, who, source, of in shares:
        if per_band is not None and total is not None and np.isfinite(per_band[ref]):
            share, share_of = float(per_band[ref]) / total, cast(ShareOf, of)
            notes.append(f"effective counts take the reference band's share of {who} "
                         f"({share:.4g}) from the table's reference-band {who} and {source}")
            break
    return SideConditions(ratio, share, share_of, tuple(notes))


def _optional(x: ArrayLike | None, what: str) -> FloatArray | None:
    if x is None:
        return None
    arr = np.atleast_1d(np.asarray(x, dtype=float))
    known = arr[np.isfinite(arr)]
    if np.any(known <= 0):
        raise ModelError(f"{what} must be positive where given")
    return arr


def _total(per_band: FloatArray | None, overall: float | None,
           what: str) -> tuple[float | None, str]:
    """An overall total: as given, else the sum over bands when all are known."""
    if overall is not None:
        if not (np.isfinite(overall) and overall > 0):
            raise ModelError(f"total {what} must be positive, got {overall}")
        return float(overall), f"total {what}"
    if per_band is not None and np.all(np.isfinite(per_band)):
        return float(per_band.sum()), f"{what} summed over the bands"
    return None, ""


def effective_counts(rr: ArrayLike, var_log_rr: ArrayLike, *, ref: int,
                     design: Design = "case-control",
                     case_ratio: float | None = None, reference_share: float | None = None,
                     share_of: ShareOf | None = None,
                     fallback: bool = True) -> LogRRCovariance:
    r"""Covariance of log RRs from effective counts (Hamling et al. 2008).

    Case-control (odds ratios), unknown reference cells :math:`A_0, B_0`:
    with :math:`c = 1/A_0 + 1/B_0` and :math:`q = A_0/B_0`, each band's cells
    follow from :math:`OR_i = A_i B_0 / (A_0 B_i)` and
    :math:`v_i = 1/A_i + 1/B_i + c`:

    .. math:: B_i = \frac{1 + 1/(OR_i\,q)}{v_i - c}, \quad A_i = OR_i\,q\,B_i,
              \quad A_0 = \frac{1 + q}{c}, \quad B_0 = \frac{1 + q}{c\,q}

    and :math:`(c, q)` solve :math:`B_0/\sum B = s_0` (``reference_share``)
    and :math:`\sum A / \sum B = R` (``case_ratio``), or with
    ``share_of="cases"`` :math:`A_0/\sum A = s_0`; the covariance is
    :math:`c` off the diagonal. Incidence rate: :math:`v_i = 1/A_i + 1/A_0`,
    :math:`A_i = 1/(v_i - 1/A_0)`, :math:`A_0/\sum A = s_0`, covariance
    :math:`1/A_0`; with ``share_of="totals"`` the share is of person-time,
    :math:`T_i \propto A_i/RR_i`. Each share falls monotonically as
    :math:`c` grows (reference cells shrink, the others grow). Cumulative
    incidence (risk ratios) is treated as incidence rate: the binomial
    shared term :math:`1/A_0 - 1/N_0` needs the group sizes, which the
    ratios and CIs do not give, so the covariance is overstated by
    :math:`1/N_0` (a rare-disease approximation, noted in the result).

    Defaults (assumptions, noted in the result), used only for what is not
    given (see :func:`table_conditions` for taking them from a table):
    ``case_ratio`` 1 and ``reference_share`` 1/B (B bands). If no counts exist, returns the
    independent covariance with a note (``fallback=True``) or raises
    :class:`ModelError`.

    Parameters
    ----------
    rr, var_log_rr
        Over all bands ``(B,)`` in table order; the reference band
        (``ref``) has RR 1 and its variance is ignored.
    """
    rr, var = _validate(rr, var_log_rr, ref)
    solved, held, case_ratio, share, notes = _assumptions(
        design, rr.size, case_ratio, reference_share, share_of)
    others = np.delete(np.arange(rr.size), ref)
    try:
        if solved == "case-control":
            assert case_ratio is not None  # _assumptions sets it for case-control
            a, b, shared = _case_control(rr[others], var[others], share, case_ratio, held)
        else:
            a, b, shared = _incidence_rate(rr[others], var[others], share, held)
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


def _assumptions(design: str, bands: int, case_ratio: float | None, share: float | None,
                 share_of: str | None) -> tuple[str, str, float | None, float, tuple[str, ...]]:
    """Design actually solved, the two side conditions, and notes on defaults."""
    if design not in ("case-control", "incidence-rate", "cumulative-incidence"):
        raise ModelError(f"effective counts support 'case-control', 'incidence-rate' and "
                         f"'cumulative-incidence', not {design!r}")
    notes = []
    if design == "cumulative-incidence":
        design = "incidence-rate"
        notes.append("risk ratios treated like rate ratios for the effective counts "
                     "(rare-disease approximation; slightly overstates the covariance)")
    if share is None or share_of is None:
        share_of = "totals" if design == "case-control" else "cases"
    if share is None:
        share = 1.0 / bands
        who = "non-cases" if design == "case-control" else "cases"
        notes.append(f"effective counts assume the reference band holds 1/{bands} of the {who}")
    if design == "case-control" and case_ratio is None:
        case_ratio = 1.0
        notes.append("effective counts assume as many cases as non-cases")
    if share_of not in ("cases", "totals"):
        raise ModelError(f"share_of must be 'cases' or 'totals', not {share_of!r}")
    if not 0 < share < 1:
        raise ModelError(f"reference_share must lie between 0 and 1, got {share}")
    if case_ratio is not None and not (np.isfinite(case_ratio) and case_ratio > 0):
        raise ModelError(f"case_ratio must be positive, got {case_ratio}")
    return design, share_of, case_ratio, share, tuple(notes)


def _case_control(rr: FloatArray, v: FloatArray, share: float, ratio: float,
                  share_of: str = "totals") -> tuple[FloatArray, FloatArray, float]:
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
        a, b, _ = cells(s, q)
        held = b if share_of == "totals" else a
        return float(np.log(held[0] / held.sum()) - np.log(share))

    def solve_c(q: float) -> float:
        return _root(lambda s: share_gap(s, q), "reference share")

    def ratio_gap(log_q: float) -> float:
        q = np.exp(log_q)
        a, b, _ = cells(solve_c(q), q)
        return float(np.log(a.sum() / b.sum()) - np.log(ratio))

    q = np.exp(_root(ratio_gap, "case ratio", bracket=np.log(ratio) + np.array([-30.0, 30.0])))
    return cells(solve_c(q), q)


def _incidence_rate(rr: FloatArray, v: FloatArray, share: float,
                    share_of: str = "cases") -> tuple[FloatArray, FloatArray, float]:
    """``1/A_0 = vmin expit(s)``; the share of cases in the reference band
    falls from 1 to 0 as ``s`` grows. Person-time in units making the
    reference rate 1."""
    vmin = v.min()

    def cases(s: float) -> FloatArray:
        gap = (v - vmin) + vmin * expit(-s)
        return cast(FloatArray, np.r_[1.0 / (vmin * expit(s)), 1.0 / gap])

    def held(s: float) -> FloatArray:
        a = cases(s)
        return a if share_of == "cases" else cast(FloatArray, a / np.r_[1.0, rr])

    s = _root(lambda s: float(np.log(held(s)[0] / held(s).sum()) - np.log(share)),
              "reference share")
    a = cases(s)
    return a, cast(FloatArray, a / np.r_[1.0, rr]), cast(float, 1.0 / a[0])


def _root(f: Callable[[float], float], what: str,
          bracket: tuple[float, float] | FloatArray = (-BRACKET, BRACKET)) -> float:
    lo, hi = (float(b) for b in bracket)
    f_lo, f_hi = f(lo), f(hi)
    if not (np.isfinite(f_lo) and np.isfinite(f_hi)) or f_lo * f_hi > 0:
        raise ModelError(f"no effective counts reproduce the {what}")
    return bisect_root(f, lo, hi, xtol=1e-13, rtol=4 * np.finfo(float).eps)


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
