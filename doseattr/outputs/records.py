"""Read the optional parts of the results dictionary (the results.json
contract written by :meth:`doseattr.analysis.results.Results.to_dict`).

Tables, figures and the report all read these parts through the functions
here, so a change of layout in the contract is absorbed in one place.
"""

from __future__ import annotations

from typing import Any


def estimate_of(record: dict | None, key: str) -> dict | None:
    """``{estimate, lower, upper, mcse}`` of ``record[key]``.

    The contract holds a fraction either as an estimate object, or as a
    plain number with its interval beside it under ``<key>_interval``
    (``burden.strata[i].paf`` and ``paf_interval``). A plain number without
    an interval gives ``{"estimate": number}``; a missing key ``None``.
    """
    if not record:
        return None
    value = record.get(key)
    if isinstance(value, dict):
        return value
    beside = record.get(f"{key}_interval")
    if isinstance(beside, dict):
        return {**beside, "estimate": value if value is not None else beside.get("estimate")}
    return None if value is None else {"estimate": value}


def burden_blocks(d: dict) -> list[tuple[str | None, dict]]:
    """``(outcome name or None, burden)`` for every burden table in the results.

    With ``[[outcome]]`` blocks, one per outcome that has strata; the
    top-level burden is added in front only when it is not the first
    outcome's own (a file with its own ``[curve]`` and ``[burden]`` beside
    the outcomes).
    """
    blocks = [(o.get("name"), o["burden"]) for o in d.get("outcomes") or []
              if _has_strata(o.get("burden"))]
    top = d.get("burden")
    if _has_strata(top) and not (blocks and top == blocks[0][1]):
        blocks.insert(0, (None, top))
    return blocks


def _has_strata(burden: Any) -> bool:
    return isinstance(burden, dict) and bool(burden.get("strata"))


def scenario_effects(record: dict) -> list[dict]:
    """Per-scenario ``{name, pif, averted}`` of a stratum or total record
    (estimate objects; ``averted`` is ``None`` where the contract has none)."""
    out = []
    for s in record.get("scenarios") or []:
        out.append({"name": s.get("name"), "pif": estimate_of(s, "pif"),
                    "averted": estimate_of(s, "averted")})
    return out


def width_by_source(d: dict) -> list[dict]:
    """``uncertainty.width_by_source``: ``{source, lower, upper, width}`` rows."""
    rows = (d.get("uncertainty") or {}).get("width_by_source") or []
    return [r for r in rows if isinstance(r, dict)]


def substitution(d: dict) -> list[dict]:
    """``exposure.substitution``: ``{fraction, parameters, paf, difference}`` rows."""
    rows = (d.get("exposure") or {}).get("substitution") or []
    return [r for r in rows if isinstance(r, dict)]


def used_dose_variant(d: dict, variant: dict) -> bool:
    """True for the dose-sensitivity row the analysis itself used: the same
    assigned doses as the study bands and the same coefficients as the curve."""
    bands = d.get("bands") or []
    doses = [b.get("dose") for b in bands]
    return (variant.get("doses") == doses
            and variant.get("coefficients") == (d.get("curve") or {}).get("coefficients"))


def workers_source(results: Any, d: dict) -> Any:
    """Per-worker cumulative exposures: the core ``WorkerExposure`` at
    ``results.workers``, else the ``workers`` list of the dictionary;
    ``None`` without work histories."""
    found = getattr(results, "workers", None)
    return found if found is not None else d.get("workers")
