"""Number formatting of the results layer (common practice: a share is
shown in percent without exponent form, and never rounded up to 100%)."""

import math

import pytest

from doseattr.results.numbers import num, share_text


@pytest.mark.parametrize("share, text", [(0.0019, "0.19%"), (0.12, "12%"), (0.999, "99.9%"),
                                         (1.0, "100%"), (0.05, "5%")])
def test_share_text(share, text):
    assert share_text(share) == text


def test_num_refuses_what_json_cannot_hold():
    assert num(None) is None and num(math.inf, open_ok=True) is None
    with pytest.raises(ValueError, match="non-finite"):
        num(math.nan)
