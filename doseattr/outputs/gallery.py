"""Every figure of the report, rendered once to PNG bytes.

:func:`render_figures` reads a ``Results`` object and returns
``{name: png_bytes}``; the report embeds them and :func:`write_outputs`
also saves them as files. Figures whose inputs are absent are skipped.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np

from doseattr.outputs import figures as fig
from doseattr.outputs.style import CYCLE, png_bytes, pyplot, styled

#: File names (without ``.png``) in report order.
FIGURE_NAMES = ("curve", "exposure", "qq", "workers", "contribution", "categorical", "paf_draws",
                "burden")


def render_figures(results: Any, data: dict | None = None) -> dict[str, bytes]:
    """PNG bytes of every figure the results support, keyed by name.

    ``data`` is ``results.to_dict()`` when the caller already has it.
    """
    data = results.to_dict() if data is None else data
    unit = data.get("unit")
    makers: dict[str, Callable[[], Any]] = {
        "curve": lambda: _curve(results, unit),
        "exposure": lambda: _exposure(results, unit),
        "qq": lambda: _qq(results, unit),
        "workers": lambda: _workers(results, data, unit),
        "contribution": lambda: _contribution(results, unit),
        "categorical": lambda: _categorical(results),
        "paf_draws": lambda: _paf_draws(results),
        "burden": lambda: _burden(data),
    }
    out = {}
    for name in FIGURE_NAMES:
        figure = makers[name]()
        if figure is not None:
            out[name] = png_bytes(figure)
    return out


def _curve(results: Any, unit: str | None):
    curve = getattr(results, "curve", None)
    if curve is None:
        return None
    band_table = getattr(results, "band_table", None)
    top = fig.curve_extent(curve, band_table, getattr(results, "exposure", None))
    ax = fig.plot_curve(curve, band_table, unit=unit, x_max=top)
    others = (getattr(results, "model_curves", None)
              or (getattr(results, "extra", None) or {}).get("model_curves") or {})
    with styled():
        for i, (label, other) in enumerate(dict(others).items()):
            if other is not curve:
                fig.add_curve(ax, other, color=CYCLE[(i + 4) % len(CYCLE)], label=str(label),
                              x_max=top)
    return ax.figure


def _exposure(results: Any, unit: str | None):
    exposure = getattr(results, "exposure", None)
    if exposure is None:
        return None
    return fig.plot_exposure(exposure, unit=unit).figure


def _qq(results: Any, unit: str | None):
    exposure = getattr(results, "exposure", None)
    fit = getattr(exposure, "fit", None)
    if (exposure is None or fig.is_empirical(exposure) or fit is None
            or getattr(fit, "values", None) is None or fit.loglik is None or fit.n < 3):
        return None
    return fig.plot_qq(exposure, unit=unit).figure


def worker_records(results: Any, data: dict) -> list[dict]:
    """Per-worker rows (worker, cumulative, ...) from the results, if any."""
    from doseattr.outputs.tables import find_workers, workers_table

    table = workers_table(find_workers(results, data))
    if table is None:
        return []
    header, rows = table
    return [dict(zip(header, row)) for row in rows]


def _workers(results: Any, data: dict, unit: str | None):
    rows = worker_records(results, data)
    values = [r["cumulative"] for r in rows if r.get("cumulative") is not None]
    if not values:
        return None
    return fig.plot_cumulative(values, unit=unit).figure


def _contribution(results: Any, unit: str | None):
    contribution = getattr(results, "contribution", None)
    if contribution is None:
        return None
    empirical = fig.is_empirical(results.exposure)
    ax = fig.plot_contribution(contribution, unit=unit,
                               minimum_risk=getattr(results, "minimum_risk", None),
                               cumulative=empirical)
    return ax.figure


def _categorical(results: Any):
    cat = getattr(results, "categorical", None)
    if cat is None:
        return None
    plt = pyplot()
    with styled():
        figure, (left, right) = plt.subplots(1, 2, figsize=(8.4, 3.4), layout="constrained",
                                             width_ratios=(1, 1.2))
    fig.plot_categorical(cat, ax=left)
    if cat.convergence:
        fig.plot_convergence(cat, ax=right)
    else:
        right.set_visible(False)
    return figure


def paf_draws(results: Any) -> np.ndarray | None:
    """The PAF's Monte Carlo draws when uncertainty was propagated
    (``results.propagation.paf[0]``: the single population stratum)."""
    prop = getattr(results, "propagation", None)
    draws = getattr(prop, "paf", None)
    if draws is None:
        return None
    draws = np.asarray(draws, float)
    draws = draws[0] if draws.ndim == 2 else draws
    return draws if draws.ndim == 1 and draws.size > 1 else None


def _paf_draws(results: Any):
    draws = paf_draws(results)
    if draws is None:
        return None
    est = getattr(results, "paf", None)
    ax = fig.plot_draws(draws, estimate=getattr(est, "estimate", None),
                        lower=getattr(est, "lower", None), upper=getattr(est, "upper", None))
    return ax.figure


def _burden(data: dict):
    burden = data.get("burden")
    if not burden and data.get("outcomes"):
        burden = data["outcomes"][0].get("burden")
    strata = (burden or {}).get("strata") or []
    if not strata:
        return None
    names = [str(s["stratum"]) for s in strata]
    att = [s["attributable"] for s in strata]
    est = [a["estimate"] if isinstance(a, dict) else a for a in att]
    lo = [a.get("lower") if isinstance(a, dict) else None for a in att]
    hi = [a.get("upper") if isinstance(a, dict) else None for a in att]
    ax = fig.plot_strata(names, est, lower=lo, upper=hi)
    return ax.figure


__all__ = ["render_figures", "FIGURE_NAMES", "paf_draws"]
