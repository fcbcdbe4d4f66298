"""The ``[curve]`` section: which source of curve (a study table, a curve
given as points or draws, or a published estimate), and the keys that go
with each, checked."""

from __future__ import annotations

from typing import Any

from doseattr.analysis.schema import Context, nonnegative, only_one, suggest
from doseattr.analysis.specs import (
    EFFECTIVE_COUNT_DESIGNS,
    FITTED_MODELS,
    SHAPE_KEYS,
    SHAPE_MODELS,
    CurveSpec,
    DrawsCurve,
    EnteredCurve,
    PointsCurve,
    ShapeCurve,
    TableCurve,
)
from doseattr.analysis.tables import (
    PointsTable,
    StudyTable,
    design_from_counts,
    read_draws_table,
    read_points_table,
    read_study_table,
)
from doseattr.errors import InputError

#: Keys of ``[curve]`` that only a pooled curve (``[[curve.study]]``) takes.
POOLED_KEYS = ("pooling", "tau_method", "predict")


def parse_curve(c: dict[str, Any], ctx: Context) -> CurveSpec:
    for key in POOLED_KEYS:
        if key in c:
            raise ctx.error(f"'{key}' goes with [[curve.study]] blocks (several study tables "
                            "pooled into one curve)", "curve", key)
    entered = only_one(c, ("rr", "err", "exponent"), ctx, "curve")
    given = [k for k in ("table", "points", "draws") if k in c] + ([entered] if entered else [])
    if len(given) > 1:
        raise ctx.error(f"give one source for the curve (table, points, draws or a published "
                        f"estimate); found {' and '.join(given)}", "curve", given[1])
    _check_shape_keys(c, given, ctx)
    if c.get("model") in SHAPE_KEYS:
        return _shape_curve(c, ctx)
    if not given:
        shapes = " or ".join(f'"{m}"' for m in SHAPE_MODELS)
        raise InputError("[curve] needs table = \"FILE.csv\" (the study's bands), points or "
                         "draws (a curve given as a CSV), a published estimate: model with "
                         "rr (log-linear), err (linear) or exponent (power), or a published "
                         f"shape (model = {shapes} with its parameters)", source=ctx.source,
                         location="[curve]")
    for key in ("knots", "knot_count"):
        if key in c and (c.get("model") != "spline" or "table" not in c):
            raise ctx.error(f"'{key}' goes with model = \"spline\" fitted to a study table",
                            "curve", key)
    if "compare_models" in c and "table" not in c:
        raise ctx.error("compare_models needs a study table to fit each model to", "curve",
                        "compare_models")
    if "table" in c:
        return _fitted_curve(c, ctx)
    if entered:
        return _entered_curve(c, entered, ctx)
    return _given_curve(c, given[0], ctx)


def _fitted_curve(c: dict[str, Any], ctx: Context) -> TableCurve:
    for key in ("per", "ci", "reference_dose"):
        if key in c:
            raise ctx.error(f"'{key}' goes with a published estimate, not with a study table "
                            "(the reference band's dose is the reference)", "curve", key)
    notes: list[str] = []
    model = c.get("model")
    if model is None:
        model = "log-linear"
        notes.append("[curve] model not given: the log-linear model was fitted")
    _model_settings(c, model, ctx)
    path = ctx.path(c["table"], "curve", "table")
    design = c.get("design")
    table = read_study_table(path, path, design=design)
    if design is None:
        design = design_from_counts(table)
    covariance = _covariance_choice(c, table, design, path, ctx)
    max_dose = nonnegative(c, "max_dose", ctx)
    beyond = c.get("beyond", "flat")
    if beyond == "extend" and max_dose is not None:
        raise ctx.error("max_dose holds the curve flat above it; it cannot go with "
                        "beyond = \"extend\"", "curve", "max_dose")
    knots, knot_count = knot_settings(c, ctx)
    compare = tuple(c.get("compare_models", ()))
    for name in compare:
        if name not in FITTED_MODELS:
            raise ctx.error(f"'{name}' is not a model that can be fitted to a table; use "
                            f"{', '.join(FITTED_MODELS)}{suggest(name, FITTED_MODELS)}",
                            "curve", "compare_models")
    total_cases, total_noncases = _study_totals(c, design, covariance, ctx)
    return TableCurve(model=model, beyond=beyond, table=table, design=design,
                     dose_rule=c.get("dose", "given"), covariance=covariance,
                     offset=float(c.get("offset", 0.0)), max_dose=max_dose, knots=knots,
                     knot_count=knot_count, compare_models=compare,
                     notes=tuple(notes) + table.notes, total_cases=total_cases,
                     total_noncases=total_noncases)


def knot_settings(c: dict[str, Any], ctx: Context) -> tuple[tuple[float, ...] | None, int]:
    """``[curve] knots`` (at least 3 increasing doses) or ``knot_count``
    (3, 4 or 5; default 3), checked."""
    knots = None
    if "knots" in c:
        knots = tuple(float(v) for v in c["knots"])
        if len(knots) < 3 or any(b <= a for a, b in zip(knots, knots[1:])):
            raise ctx.error("knots must be at least 3 increasing doses, for example [5, 20, 60]",
                            "curve", "knots")
        if "knot_count" in c:
            raise ctx.error("give knots or knot_count, not both", "curve", "knot_count")
    knot_count = int(c.get("knot_count", 3))
    if not 3 <= knot_count <= 5:
        raise ctx.error(f"knot_count must be 3, 4 or 5 (default knots at Harrell's percentiles "
                        f"of the doses), got {knot_count}", "curve", "knot_count")
    return knots, knot_count


#: The key of the study's total non-cases for each design with effective counts.
TOTAL_KEYS = {"case-control": "total_controls", "incidence-rate": "total_person_time"}


def _study_totals(c: dict[str, Any], design: str | None, covariance: str,
                  ctx: Context) -> tuple[float | None, float | None]:
    """``total_cases`` and the design's total of non-cases, for effective
    counts only (Hamling et al. 2008 use them for the case ratio and, with
    a reference band's count, its share)."""
    given = [k for k in ("total_cases", *TOTAL_KEYS.values()) if k in c]
    if not given:
        return None, None
    if covariance != "effective-counts":
        raise ctx.error(f"'{given[0]}' is used by effective counts only; add covariance = "
                        "\"effective-counts\" or remove it", "curve", given[0])
    wrong = [k for k in TOTAL_KEYS.values() if k in c and k != TOTAL_KEYS.get(design or "")]
    if wrong:
        raise ctx.error(f"'{wrong[0]}' does not go with design = \"{design}\"; give "
                        f"{TOTAL_KEYS.get(design or '', 'total_controls')}", "curve", wrong[0])
    values = []
    for key in ("total_cases", TOTAL_KEYS[design or "case-control"]):
        v = c.get(key)
        if v is not None and not v > 0:
            raise ctx.error(f"{key} must be above 0, got {v:g}", "curve", key)
        values.append(None if v is None else float(v))
    return values[0], values[1]


def _covariance_choice(c: dict[str, Any], table: StudyTable, design: str | None, path: str,
                       ctx: Context) -> str:
    """``counts`` when the table has them, else ``effective-counts`` when
    the design is known, else ``independent`` (unless the file says)."""
    covariance = c.get("covariance")
    if covariance == "counts" and not table.counts:
        raise ctx.error(f"covariance = \"counts\" needs count columns (cases with controls, "
                        f"person_time or persons) in {path}", "curve", "covariance")
    if covariance == "effective-counts":
        if design is None:
            raise ctx.error("effective counts need the study design: add design = "
                            "\"case-control\" or \"incidence-rate\"", "curve", "covariance")
        if design not in EFFECTIVE_COUNT_DESIGNS:
            raise ctx.error(f"effective counts (Hamling et al. 2008) are available for "
                            f"case-control and incidence-rate studies, not {design}; use "
                            "\"counts\" or \"independent\"", "curve", "covariance")
    if covariance is not None:
        return covariance
    if table.counts:
        return "counts"
    if design in EFFECTIVE_COUNT_DESIGNS:
        return "effective-counts"
    return "independent"


def _given_curve(c: dict[str, Any], key: str, ctx: Context) -> PointsCurve | DrawsCurve:
    """A curve given as points (dose, RR, CI) or as draws of RR on doses."""
    for other in ("model", "per", "ci", "design", "dose", "covariance", "offset", "max_dose"):
        if other in c:
            raise ctx.error(f"'{other}' does not apply to a curve given as {key}", "curve",
                            other)
    if c.get("beyond", "flat") != "flat":
        raise ctx.error(f"a curve given as {key} is held flat beyond its last dose; it cannot "
                        "be extended", "curve", "beyond")
    path = ctx.path(c[key], "curve", key)
    data = read_points_table(path, path) if key == "points" else read_draws_table(path, path)
    reference = nonnegative(c, "reference_dose", ctx)
    if reference is not None and not data.doses[0] <= reference <= data.doses[-1]:
        raise ctx.error(f"reference_dose {reference:g} lies outside the doses of {path} "
                        f"({data.doses[0]:g} to {data.doses[-1]:g})", "curve", "reference_dose")
    ref = data.reference_dose if reference is None else reference
    if isinstance(data, PointsTable):
        return PointsCurve(model="points", beyond="flat", given=data, reference_dose=ref,
                           notes=data.notes)
    return DrawsCurve(model="points", beyond="flat", given=data, reference_dose=ref,
                      notes=data.notes)


def _entered_curve(c: dict[str, Any], entered: str, ctx: Context) -> EnteredCurve:
    wanted = {"rr": "log-linear", "err": "linear", "exponent": "power"}[entered]
    model = c.get("model")
    if model is None:
        raise ctx.error(f"a published estimate needs model = \"{wanted}\" beside '{entered}'",
                        "curve", "model")
    allowed = {"log-linear": ("rr",), "linear": ("err", "rr"), "power": ("exponent",)}
    if model not in allowed:
        raise ctx.error(f"model \"{model}\" cannot be entered as a published estimate; use "
                        "log-linear (rr), linear (err) or power (exponent)", "curve", "model")
    if entered not in allowed[model]:
        raise ctx.error(f"the {model} model takes {' or '.join(allowed[model])}, not "
                        f"'{entered}'", "curve", entered)
    for key in ("design", "dose", "covariance"):
        if key in c:
            raise ctx.error(f"'{key}' applies to a curve fitted to a study table", "curve", key)
    _model_settings(c, model, ctx)
    per = float(c.get("per", 1.0))
    if per <= 0:
        raise ctx.error(f"per must be a positive dose increment, got {per:g}", "curve", "per")
    if model == "power" and "per" in c:
        raise ctx.error("the power model's exponent has no dose increment; remove 'per'",
                        "curve", "per")
    value = float(c[entered])
    if (model == "log-linear" or entered == "rr") and value <= 0:
        raise ctx.error(f"RR must be greater than 0, got {value:g}", "curve", entered)
    ci = None
    if "ci" in c:
        lo, hi = (float(v) for v in c["ci"])
        if not lo < hi:
            raise ctx.error(f"the CI's first number must be below its second, got [{lo:g}, "
                            f"{hi:g}]", "curve", "ci")
        if not lo <= value <= hi:
            raise ctx.error(f"the CI [{lo:g}, {hi:g}] does not contain its estimate "
                            f"{entered} = {value:g}", "curve", "ci")
        if (model == "log-linear" or entered == "rr") and lo <= 0:
            raise ctx.error(f"a CI of an RR must be above 0, got [{lo:g}, {hi:g}]", "curve", "ci")
        ci = (lo, hi)
    max_dose = nonnegative(c, "max_dose", ctx)
    beyond = c.get("beyond", "flat" if max_dose is not None else "extend")
    if beyond == "flat" and max_dose is None:
        raise ctx.error("beyond = \"flat\" needs max_dose (the dose above which the RR is held "
                        "flat) for a curve entered directly", "curve", "beyond")
    reference = nonnegative(c, "reference_dose", ctx)
    return EnteredCurve(model=model, beyond=beyond, offset=float(c.get("offset", 0.0)),
                        estimate=entered, value=value, per=per, ci=ci,
                        reference_dose=0.0 if reference is None else reference,
                        max_dose=max_dose)


def _model_settings(c: dict[str, Any], model: str, ctx: Context) -> None:
    if model not in FITTED_MODELS:
        raise ctx.error(f"model \"{model}\" cannot be fitted to a study table; use "
                        f"{', '.join(FITTED_MODELS)}", "curve", "model")
    if "offset" in c and model != "power":
        raise ctx.error(f"offset belongs to the power model, not {model}", "curve", "offset")


# -- published shapes -------------------------------------------------------------
def _shape_names(model: str) -> tuple[str, ...]:
    coef, settings = SHAPE_KEYS[model]
    return coef + tuple(f"{k}_se" for k in coef) + settings + ("threshold",)


def _check_shape_keys(c: dict[str, Any], given: list[str], ctx: Context) -> None:
    """Shape keys only with their model; a shape model only on its own."""
    model = c.get("model")
    if model in SHAPE_KEYS and given:
        coef = ", ".join(SHAPE_KEYS[model][0])
        raise ctx.error(f"model = \"{model}\" is entered with its parameters ({coef}), not "
                        f"with '{given[0]}'", "curve", given[0])
    own = _shape_names(model) if model in SHAPE_KEYS else ()
    for name in SHAPE_KEYS:
        for key in _shape_names(name):
            if key in c and key not in own:
                raise ctx.error(f"'{key}' goes with model = \"{name}\"", "curve", key)


def _shape_curve(c: dict[str, Any], ctx: Context) -> ShapeCurve:
    """A published shape entered with its parameters (Burnett et al. 2014,
    Environ Health Perspect 122:397; Burnett et al. 2018, PNAS 115:9592;
    forms in :mod:`doseattr.core.curves.shapes`)."""
    model = c["model"]
    coef_names, setting_names = SHAPE_KEYS[model]
    for key in ("per", "ci", "design", "dose", "covariance", "offset"):
        if key in c:
            raise ctx.error(f"'{key}' does not apply to model = \"{model}\"", "curve", key)
    for key in coef_names + setting_names:
        if key not in c:
            need = ", ".join(coef_names + setting_names)
            raise ctx.error(f"missing key '{key}' (model = \"{model}\" needs {need})", "curve",
                            key)
    values = {k: float(c[k]) for k in coef_names + setting_names}
    _check_shape_values(values, ctx)
    se = {k: float(c.get(f"{k}_se", 0.0)) for k in coef_names}
    for k, v in se.items():
        if v < 0:
            raise ctx.error(f"a standard error must be 0 or more, got {v:g}", "curve", f"{k}_se")
    threshold = nonnegative(c, "threshold", ctx)
    max_dose = nonnegative(c, "max_dose", ctx)
    beyond = _shape_beyond(c, max_dose, ctx)
    reference = nonnegative(c, "reference_dose", ctx)
    settings = {"threshold": threshold or 0.0, **{k: values[k] for k in setting_names}}
    return ShapeCurve(model=model, beyond=beyond, max_dose=max_dose,
                      reference_dose=reference or 0.0,
                      coef=tuple(values[k] for k in coef_names),
                      cov=tuple(tuple(se[a] ** 2 if a == b else 0.0 for b in coef_names)
                                for a in coef_names),
                      settings=settings, notes=_shape_notes(c, se, threshold))


def _check_shape_values(values: dict[str, float], ctx: Context) -> None:
    rules = {"alpha": (-1.0, "alpha must be above -1 (1 + alpha is the RR at saturation and "
                             "must stay above 0)"),
             "gamma": (0.0, "gamma must be above 0"), "delta": (0.0, "delta must be above 0"),
             "scale": (0.0, "scale must be above 0 (a dose)"),
             "spread": (0.0, "spread must be above 0 (a dose)")}
    for key, (low, message) in rules.items():
        if key in values and values[key] <= low:
            raise ctx.error(f"{message}, got {values[key]:g}", "curve", key)


def _shape_beyond(c: dict[str, Any], max_dose: float | None, ctx: Context) -> str:
    beyond = c.get("beyond", "flat" if max_dose is not None else "extend")
    if beyond == "flat" and max_dose is None:
        raise ctx.error("beyond = \"flat\" needs max_dose (the dose above which the RR is held "
                        "flat)", "curve", "beyond")
    return beyond


def _shape_notes(c: dict[str, Any], se: dict[str, float],
                 threshold: float | None) -> tuple[str, ...]:
    notes = []
    if threshold is None:
        notes.append("[curve] threshold not given: 0, so RR rises from zero exposure")
    fixed = [k for k, v in se.items() if v == 0]
    if len(fixed) == len(se):
        notes.append("no standard errors given: the curve carries no uncertainty")
    elif fixed:
        notes.append(f"{', '.join(fixed)} held fixed (no standard error given); the other "
                     "parameters vary independently in the Monte Carlo draws")
    return tuple(notes)
