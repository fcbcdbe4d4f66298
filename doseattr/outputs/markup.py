"""Small HTML and number-formatting helpers for the report.

Every piece of text passed in is escaped with :func:`html.escape`; callers
pass plain text, never markup.
"""

from __future__ import annotations

import base64
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from html import escape
from typing import Any

from doseattr.results import Estimate
from doseattr.results.numbers import percent

NA = "\u2013"  # en dash for "not applicable"


def num(value: Any, digits: int = 4) -> str:
    """A number with ``digits`` significant figures, or a dash."""
    if value is None:
        return NA
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    return f"{float(value):.{digits}g}"


def pct(value: Any, digits: int = 3) -> str:
    """A fraction as a percentage with ``digits`` significant figures."""
    if value is None:
        return NA
    return percent(value, digits)


def finite(value: Any) -> float | None:
    """``value`` as a float, or ``None`` when it is not finite (an open
    band limit, the empty interval of a reference band)."""
    v = float(value)
    return v if math.isfinite(v) else None


def interval(lower: Any, upper: Any, fmt: Callable[[Any], str] = pct) -> str:
    if lower is None or upper is None:
        return NA
    return f"{fmt(lower)} to {fmt(upper)}"


def with_unit(value: Any, unit: str | None) -> str:
    return f"{num(value)} {unit}" if unit and value is not None else num(value)


def table(header: Sequence[str], rows: Iterable[Sequence[Any]], *, cls: str = "",
          caption: str | None = None) -> str:
    """An HTML table; every cell is escaped (cells are plain text)."""
    head = "".join(f"<th>{escape(str(h))}</th>" for h in header)
    body = "".join("<tr>" + "".join(f"<td>{escape(str(c))}</td>" for c in row) + "</tr>"
                   for row in rows)
    cap = f"<caption>{escape(caption)}</caption>" if caption else ""
    klass = f' class="{cls}"' if cls else ""
    return scroll(f"<table{klass}>{cap}<thead><tr>{head}</tr></thead><tbody>{body}</tbody>"
                  "</table>")


def scroll(markup: str) -> str:
    """``markup`` (a table) in a box that scrolls sideways on a narrow screen,
    so that the page itself never does."""
    return f'<div class="scroll">{markup}</div>'


def definition_list(items: Iterable[tuple[str, str]]) -> str:
    rows = "".join(f"<tr><th scope='row'>{escape(k)}</th><td>{escape(v)}</td></tr>"
                   for k, v in items)
    return scroll(f'<table class="facts"><tbody>{rows}</tbody></table>')


def image(png: bytes | None, alt: str) -> str:
    if not png:
        return ""
    data = base64.b64encode(png).decode("ascii")
    return (f'<figure><img alt="{escape(alt)}" src="data:image/png;base64,{data}">'
            f"<figcaption>{escape(alt)}</figcaption></figure>")


def section(anchor: str, title: str, body: str) -> str:
    if not body:
        return ""
    return f'<section id="{anchor}"><h2>{escape(title)}</h2>{body}</section>'


def para(text: str) -> str:
    return f"<p>{escape(text)}</p>"


def bullets(lines: Iterable[str]) -> str:
    return "<ul>" + "".join(f"<li>{escape(s)}</li>" for s in lines) + "</ul>"


def notes_list(notes: Iterable[str], heading: str | None = None) -> str:
    """Small print on how the inputs were read, when there is any."""
    lines = [str(n) for n in notes if n]
    if not lines:
        return ""
    head = f"<p>{escape(heading)}</p>" if heading else ""
    return f'<div class="notes">{head}{bullets(lines)}</div>'


def estimate_text(est: Estimate | None, fmt: Callable[[Any], str] = pct) -> str:
    """``"9.46% (4.42% to 17.0%)"`` from an estimate; the estimate alone
    without limits; a dash for ``None``."""
    if est is None:
        return NA
    text = fmt(est.estimate)
    if est.lower is not None and est.upper is not None:
        text += f" ({interval(est.lower, est.upper, fmt)})"
    return text


def figure(images: Mapping[str, bytes], name: str, alt: str) -> str:
    """The figure ``name`` of ``images`` with its caption, or ``""`` when
    it was not drawn."""
    return image(images[name], alt) if name in images else ""


def worded(wording: Mapping[str, str], key: str, default: str | None = None) -> str:
    """How ``key`` reads in the report (``wording[key]``), else ``default``
    (``key`` itself when not given)."""
    if key in wording:
        return wording[key]
    return key if default is None else default


def warning_box(lines: Iterable[str], heading: str = "Warning:") -> str:
    """A highlighted box of warnings next to the numbers they concern."""
    lines = [str(s) for s in lines if s]
    if not lines:
        return ""
    return (f'<div class="warnings"><p><strong>{escape(heading)}</strong></p>'
            + bullets(lines) + "</div>")


def signed_points(v: Any) -> str:
    """A difference of two fractions in percentage points, with its sign."""
    if v is None:
        return NA
    return points_text(v, signed=True)


def points_text(v: float, *, signed: bool = False) -> str:
    """A difference of fractions in percentage points, by the rule of
    :func:`~doseattr.results.numbers.percent` (``"+1.23 points"``)."""
    text = percent(v).removesuffix("%")
    sign = "+" if signed and v > 0 and not text.startswith("<") else ""
    return f"{sign}{text} points"
