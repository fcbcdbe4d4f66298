"""The report's section on ``[limit]``: the compliance statement with the
rule behind it, the exceedance fraction, the 95th percentile's upper
tolerance limit and the arithmetic mean with their confidence limits, and,
with a worker column, the within- and between-worker variation and the
workers at risk. Reads :class:`~doseattr.results.records.LimitSection`.
"""

from __future__ import annotations

from collections.abc import Sequence

from doseattr.outputs.burden_report import cases
from doseattr.outputs.markup import definition_list, estimate_text, num, para, table, warning_box
from doseattr.results.numbers import share_or_dash as _share
from doseattr.results.numbers import share_text
from doseattr.results.records import LimitSection, ScenarioResult

#: Shown beside every compliance statement.
DEFER = ("A statistical compliance statement supports, and does not replace, the judgement of "
         "a qualified occupational hygienist under the regulations that apply where the work "
         "is done: check the limit value, the sampling strategy (EN 689 asks for samples of "
         "a similar exposure group over representative shifts) and the measurement method "
         "with them before acting on it.")

#: Verdict -> the CSS class of its box.
VERDICT_CLASS = {"complies": "verdict", "does not comply": "verdict fail"}


def limit_section(lim: LimitSection | None, unit: str | None,
                  scenarios: Sequence[ScenarioResult] = ()) -> str:
    """The section's HTML; empty without ``[limit]``. ``scenarios`` are the
    run's; a ``comply`` scenario's PIF (and averted cases) is repeated here."""
    if lim is None:
        return ""
    parts = [decision_block(lim, unit), statistics_table(lim, unit),
             para(methods_text(lim)), workers_block(lim, unit),
             *(compliance_text(s) for s in scenarios if s.kind == "comply"),
             para("limit.csv holds these figures; limit_workers.csv each worker's estimate "
                  "when the samples name their workers." if lim.workers is not None else
                  "limit.csv holds these figures."),
             warning_box([DEFER], "Caution:")]
    return "".join(p for p in parts if p)


def _u(unit: str | None) -> str:
    return f" {unit}" if unit else ""


def decision_block(lim: LimitSection, unit: str | None) -> str:
    """The verdict, the rule applied and the numbers behind it."""
    s, d = lim.stats, lim.stats.decision
    memory = " (the rule as recalled, from memory: check it against the standard)" \
        if d.from_memory else ""
    rule = d.rule[:1].upper() + d.rule[1:]
    text = (f"Verdict for the {s.n} samples against the limit {num(s.limit)}{_u(unit)}: "
            f"{d.verdict} (EN 689 {d.test} test). {rule}{memory}.")
    cls = VERDICT_CLASS.get(d.verdict, "verdict")
    return f'<div class="{cls}"><p>{_escape(text)}</p></div>'


def compliance_text(s: ScenarioResult) -> str:
    """What compliance would prevent: the comply scenario's PIF and, with a
    burden table, its averted cases."""
    averted = ("" if s.averted is None else
               f", {estimate_text(s.averted, cases)} cases averted")
    return para(f"If the group complied (scenario '{s.name}': {s.description}), the "
                f"fraction of cases prevented would be {estimate_text(s.pif)}{averted}.")


def _escape(text: str) -> str:
    from html import escape

    return escape(text)


def statistics_table(lim: LimitSection, unit: str | None) -> str:
    """Exceedance fraction, 95th percentile and arithmetic mean with their
    two-sided interval and one-sided upper limit."""
    s = lim.stats
    lvl, conf = f"{s.level:.0%}", f"{s.confidence:.0%}"
    header = ["quantity", "estimate", f"{lvl} interval", f"upper limit at {conf}"]
    rows = [["Exceedance fraction P(X > limit)", _share(s.exceedance.estimate),
             _pair(s.exceedance.lower, s.exceedance.upper, _share), _share(s.exceedance.ucl)],
            [f"95th percentile ({unit or 'exposure unit'})", num(s.p95.estimate),
             _pair(s.p95.lower, s.p95.upper, num), f"{num(s.p95.ucl)} (UTL)"],
            [f"Arithmetic mean ({unit or 'exposure unit'})", num(s.mean.estimate),
             _pair(s.mean.lower, s.mean.upper, num), num(s.mean.ucl)]]
    notes = [b.note for b in (s.exceedance, s.p95, s.mean) if b.note]
    over = (f"The exceedance fraction's upper limit at {conf} is above the tolerated "
            f"{share_text(s.exceedance_tolerated)}." if s.overexposure else
            f"The exceedance fraction's upper limit at {conf} is at or below the tolerated "
            f"{share_text(s.exceedance_tolerated)}.")
    return table(header, rows) + para(over) + "".join(para(n) for n in notes)


def _pair(lo, hi, fmt) -> str:
    return f"{fmt(lo)} to {fmt(hi)}"


def methods_text(lim: LimitSection) -> str:
    s = lim.stats
    how = ("exact methods for lognormal samples without non-detects" if s.exact else
           "the profile likelihood of the fitted distribution, with non-detects left-censored")
    methods = list(dict.fromkeys(s.methods))
    return (f"Fitted distribution: {s.family}; {s.n} samples, {s.n_censored} below a detection "
            f"limit; confidence limits by {how}. Methods: " + "; ".join(methods) + ".")


def workers_block(lim: LimitSection, unit: str | None) -> str:
    """Within- and between-worker variation and the workers above the limit."""
    w = lim.workers
    if w is None:
        return "".join(para(n) for n in lim.notes)
    facts = [("Workers, samples", f"{w.n_workers}, {w.n_samples} ({w.n_censored} non-detects)"),
             ("Within-worker GSD", f"{w.gsd_within:.3g}"),
             ("Between-worker GSD", f"{w.gsd_between:.3g}"),
             ("Intraclass correlation", f"{w.icc:.3g} (share of the log-scale variance "
                                        "between workers)")]
    e = lim.worker_exceedance
    if e is not None:
        facts.append(("A randomly chosen worker's long-term mean above the limit",
                      f"{_share(e.estimate)} ({e.level:.0%} interval "
                      f"{_pair(e.lower, e.upper, _share)})"))
    parts = [para(f"The samples name their workers, so a one-way random-effects model on the "
                  f"log scale separates day-to-day variation within a worker from differences "
                  f"between workers ({w.method})."), definition_list(facts)]
    if lim.workers_above:
        rows = [[x.worker, x.n, num(x.long_term_mean)] for x in lim.workers_above]
        parts += [para(f"Workers whose own estimated long-term mean is above the limit "
                       f"({len(lim.workers_above)} of {w.n_workers}):"),
                  table(["worker", "samples", f"estimated long-term mean{_u(unit)}"], rows)]
    else:
        parts.append(para("No worker's own estimated long-term mean is above the limit."))
    parts += [para(n) for n in lim.notes]
    return "".join(parts)
