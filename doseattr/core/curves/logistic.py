"""The logistic function in numpy alone, so that modules needing only it
load without ``scipy.special`` (start-up time of ``doseattr check``)."""

from __future__ import annotations

from typing import cast

import numpy as np
from numpy.typing import ArrayLike

from doseattr.core.curves.base import FloatArray


def expit(x: ArrayLike) -> FloatArray:
    r""":math:`1 / (1 + e^{-x})`, computed as :math:`1/(1 + e^{-x})` for
    :math:`x \ge 0` and :math:`e^{x}/(1 + e^{x})` for :math:`x < 0`, so the
    exponential never overflows and small results keep their relative
    precision (the usual stable branch form, common practice). A scalar in
    gives a 0-d array out, as ``scipy.special.expit`` does for arrays."""
    x = np.asarray(x, dtype=float)
    e = np.exp(-np.abs(x))
    return cast(FloatArray, np.where(x >= 0, 1.0 / (1.0 + e), e / (1.0 + e)))
