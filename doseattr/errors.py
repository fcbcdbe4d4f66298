"""Exception and warning types shared by every layer.

Input errors carry where the problem is (file, row, column or key) and what
is wrong, so the command line can print one line and exit with status 2.
Numerical failures inside the core are a separate type: they mean the
numbers asked for do not exist (a diverging integral) or could not be found.
"""

from __future__ import annotations


class DoseattrError(Exception):
    """Base class of every error this package raises on purpose."""


class InputError(DoseattrError):
    """Invalid user input, reported as one line.

    Parameters
    ----------
    message
        What is wrong and, where possible, how to fix it.
    source
        The file the problem is in (analysis file or table), if any.
    location
        Row, column or key, for example ``"row 3, column 'rr'"`` or
        ``"[curve] key 'model'"``.
    """

    def __init__(self, message: str, *, source: str | None = None,
                 location: str | None = None) -> None:
        self.message = message
        self.source = source
        self.location = location
        super().__init__(self.line())

    def line(self) -> str:
        parts = [p for p in (self.source, self.location) if p]
        prefix = ": ".join(parts)
        return f"{prefix}: {self.message}" if prefix else self.message

    def at(self, *, source: str | None = None, location: str | None = None) -> InputError:
        """Return a copy with the file or location filled in where missing."""
        return InputError(self.message, source=self.source or source,
                          location=self.location or location)


class ModelError(DoseattrError, ValueError):
    """Parameters or data that a core model cannot accept.

    Raised by the numerical core; the analysis layer turns it into an
    :class:`InputError` naming the key or row the values came from.
    """


class DivergenceError(ModelError):
    """An expectation that has no finite value (for example a log-linear
    curve extended over a lognormal tail)."""


class FloatRangeError(DivergenceError):
    """An expectation whose value lies outside double precision (an expected
    RR that overflows 1.8e308 or underflows to 0): the curve's coefficients
    or units are extreme, whatever is done with its tail."""


class ConvergenceError(DoseattrError, RuntimeError):
    """An optimiser or root finder that did not converge."""


class FitError(ModelError, ConvergenceError):
    """A distribution that could not be fitted to the user's data: found by
    a numerical search, but an input problem, which the analysis layer names
    by file and column like any :class:`ModelError`."""


class DoseattrWarning(UserWarning):
    """Something the user should read: a poor fit, heavy censoring,
    extrapolation beyond the data."""
