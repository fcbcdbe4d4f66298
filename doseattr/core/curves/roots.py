"""A bracketed scalar root by bisection, in plain Python, so that the
pseudo-count reconstructions need no ``scipy.optimize`` (start-up time of
``doseattr check``)."""

from __future__ import annotations

from collections.abc import Callable

from doseattr.errors import ModelError


def bisect_root(f: Callable[[float], float], lo: float, hi: float, *, xtol: float,
                rtol: float, maxiter: int = 500) -> float:
    r"""A root of ``f`` in ``[lo, hi]``, where ``f`` changes sign, by
    bisection: the bracket is halved, keeping the sign change, until its
    width is at most ``xtol + rtol * max(|lo|, |hi|)`` (the stopping rule of
    ``scipy.optimize.brentq``); the midpoint is returned. Bisection gains
    one bit per step, so about 60 steps reach double precision on a
    bracket of width 10 (closed form: :math:`\log_2(10 / 10^{-14})`).

    Raises :class:`ModelError` when ``f`` has the same sign at both ends,
    or is not finite there.
    """
    lo, hi = float(lo), float(hi)
    f_lo, f_hi = float(f(lo)), float(f(hi))
    if f_lo == 0.0:
        return lo
    if f_hi == 0.0:
        return hi
    if not (f_lo == f_lo and f_hi == f_hi) or (f_lo > 0) == (f_hi > 0):
        raise ModelError(f"no sign change between {lo:g} and {hi:g}: no root in the bracket")
    for _ in range(maxiter):
        mid = 0.5 * (lo + hi)
        if hi - lo <= xtol + rtol * max(abs(lo), abs(hi)):
            return mid
        f_mid = float(f(mid))
        if f_mid == 0.0:
            return mid
        if (f_mid > 0) == (f_lo > 0):
            lo, f_lo = mid, f_mid
        else:
            hi = mid
    return 0.5 * (lo + hi)
