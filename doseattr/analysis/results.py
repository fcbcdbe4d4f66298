"""The result of one analysis run: numbers, the objects behind them, and
their two renderings (the ``results.json`` dictionary and a text summary).

``Results.to_dict()`` is the ``results.json`` contract (schema version
"1.0"); the keys other programs read are listed in the project's API notes
and are all present here, with more beside them. Every number is a plain
``float`` (or ``None``); a NaN or infinity reaching this dictionary is a
bug, and :func:`json_safe` refuses it rather than writing it.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.core.attribution.contribution import Contribution
from doseattr.core.curves.base import Curve
from doseattr.core.exposure.base import Exposure

SCHEMA_VERSION = "1.0"
FloatArray = NDArray[np.float64]


@dataclass(frozen=True)
class Estimate:
    """A point estimate with an optional interval and Monte Carlo error.

    ``lower``/``upper`` are the 2.5th and 97.5th percentiles of the draws
    and ``mcse`` the Monte Carlo standard error of ``estimate``; all three
    stay ``None`` until uncertainty is propagated.
    """

    estimate: float
    lower: float | None = None
    upper: float | None = None
    mcse: float | None = None

    def to_dict(self) -> dict[str, float | None]:
        return {"estimate": _num(self.estimate), "lower": _num(self.lower),
                "upper": _num(self.upper), "mcse": _num(self.mcse)}

    def text(self, percent: bool = True) -> str:
        """``"12.3%"`` or ``"12.3% (9.1% to 15.0%)"``."""
        f = _pct if percent else _g
        if self.lower is None or self.upper is None:
            return f(self.estimate)
        return f"{f(self.estimate)} ({f(self.lower)} to {f(self.upper)})"


@dataclass(frozen=True)
class ScenarioResult:
    """One exposure-reduction scenario and its potential impact fraction."""

    name: str
    kind: str
    value: float
    pif: Estimate
    description: str = ""


@dataclass(frozen=True, eq=False)
class BandTable:
    """The study's bands as the fit used them (table order, lowest first).

    Arrays of length ``B``; ``upper`` is ``inf`` for an open-ended top band,
    ``ci_lower``/``ci_upper`` are NaN for the reference band (whose CI is
    empty by definition). ``dose_rule`` says how each dose was assigned.
    """

    lower: FloatArray
    upper: FloatArray
    dose: FloatArray
    rr: FloatArray
    ci_lower: FloatArray
    ci_upper: FloatArray
    reference: NDArray[np.bool_]
    dose_rule: tuple[str, ...]
    source: str | None = None

    def rows(self) -> list[dict[str, Any]]:
        """One JSON-safe dictionary per band."""
        return [{"lower": _num(self.lower[i]), "upper": _num(self.upper[i], open_ok=True),
                 "dose": _num(self.dose[i]), "rr": _num(self.rr[i]),
                 "ci_lower": _num(self.ci_lower[i], open_ok=True),
                 "ci_upper": _num(self.ci_upper[i], open_ok=True),
                 "reference": bool(self.reference[i]), "dose_rule": self.dose_rule[i]}
                for i in range(len(self.rr))]


@dataclass(frozen=True, eq=False)
class CurveVariant:
    """The same analysis under another curve model or dose-assignment rule.

    ``label`` is the model name (model comparison) or the dose rule (dose
    sensitivity); ``curve`` and ``paf`` are ``None`` with ``problem`` set
    when that variant could not be computed.
    """

    label: str
    curve: Curve | None
    paf: float | None
    doses: FloatArray | None = None
    problem: str | None = None

    def to_dict(self) -> dict[str, Any]:
        c = self.curve
        fit = None if c is None else c.fit
        return {"label": self.label,
                "model": None if c is None else c.model.name,
                "coefficients": None if c is None else _nums(c.coef),
                "standard_errors": None if c is None else _nums(np.sqrt(np.maximum(
                    np.diag(c.cov), 0.0))),
                "doses": None if self.doses is None else _nums(self.doses),
                "q": None if fit is None else _num(fit.q),
                "df": None if fit is None else int(fit.df),
                "p_value": None if fit is None else _num(fit.p_value),
                "nonlinearity_p": None if c is None else _num(_nonlinearity_p(c)),
                "paf": _num(self.paf), "problem": self.problem}


@dataclass(frozen=True)
class ExposureVariant:
    """The PAF under another description of the same exposure data: each
    fitted family, and the empirical distribution of the values."""

    label: str
    parameters: dict
    aic: float | None
    paf: float | None
    problem: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"family": self.label, "parameters": _params(self.parameters),
                "aic": _num(self.aic), "paf": _num(self.paf), "problem": self.problem}


@dataclass(frozen=True)
class SubstitutionResult:
    """The main family refitted with each non-detect replaced by
    ``fraction`` x its detection limit, for comparison only: its
    parameters, the PAF it gives and ``difference`` = that PAF minus the
    main (censored-likelihood) PAF. ``problem`` says why a fit failed."""

    fraction: float
    parameters: dict
    paf: float | None
    difference: float | None
    problem: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {"fraction": _num(self.fraction), "parameters": _params(self.parameters),
                "paf": _num(self.paf), "difference": _num(self.difference),
                "problem": self.problem}


@dataclass(frozen=True)
class SourceWidth:
    """The 95% interval of the overall PAF when only ``source`` varies
    (``"all"`` for every source together); with ``[burden]`` also the
    interval of the total attributable cases, ``attributable = (lower,
    upper)`` (Poisson variation of the cases moves these, and the overall
    PAF only when the strata's PAFs differ)."""

    source: str
    lower: float
    upper: float
    attributable: tuple[float, float] | None = None

    @property
    def width(self) -> float:
        return self.upper - self.lower

    def to_dict(self) -> dict[str, Any]:
        cases = None
        if self.attributable is not None:
            lo, hi = self.attributable
            cases = {"lower": _num(lo), "upper": _num(hi), "width": _num(hi - lo)}
        return {"source": self.source, "lower": _num(self.lower), "upper": _num(self.upper),
                "width": _num(self.width), "attributable": cases}


@dataclass(frozen=True)
class StratumResult:
    """Attributable cases in one stratum (or the total): observed cases,
    PAF, attributable cases, and per scenario ``(name, pif, averted)``."""

    stratum: str
    cases: float
    paf: Estimate
    attributable: Estimate
    scenarios: tuple[tuple[str, Estimate, Estimate], ...] = ()
    population: float | None = None

    def to_dict(self) -> dict[str, Any]:
        """``paf`` is the point estimate (a plain number); its interval is
        under ``paf_interval``; ``attributable`` is an interval object."""
        return {"stratum": self.stratum, "cases": _num(self.cases),
                "population": _num(self.population), "paf": _num(self.paf.estimate),
                "paf_interval": self.paf.to_dict(),
                "attributable": self.attributable.to_dict(),
                "scenarios": [{"name": n, "pif": p.to_dict(), "averted": a.to_dict()}
                              for n, p, a in self.scenarios]}


@dataclass(frozen=True)
class BurdenResult:
    """Attributable cases by stratum and in total (totals are sums over the
    strata draw by draw; the total PAF is total attributable over total
    cases)."""

    strata: tuple[StratumResult, ...]
    total: StratumResult

    def to_dict(self) -> dict[str, Any]:
        total = self.total.to_dict()
        total.pop("stratum")
        return {"strata": [s.to_dict() for s in self.strata], "total": total}


@dataclass(frozen=True, eq=False)
class Results:
    """Everything one run produced.

    Attributes
    ----------
    analysis
        The :class:`~doseattr.analysis.config.Analysis` that was run.
    curve, exposure
        The core objects the fractions were computed from.
    minimum_risk
        The minimum-risk level used for the point estimates (the middle of
        the range when a range was given).
    paf
        Population attributable fraction.
    scenarios
        One :class:`ScenarioResult` per ``[[scenario]]``, in file order.
    categorical
        The multi-category comparison.
    contribution
        Where the burden comes from along the exposure axis.
    warnings, cautions, notes
        Things the reader must see: problems with this run; the standing
        cautions on interpreting any PAF; how inputs were interpreted.
    band_table
        The study's bands with their assigned doses, or ``None`` for a
        curve entered directly.
    propagation
        The Monte Carlo draws (:class:`~doseattr.core.uncertainty.propagate.Propagation`,
        one stratum named ``"population"``) when ``[uncertainty]`` was run,
        else ``None``: ``propagation.paf[0]`` holds the PAF draws and
        ``propagation.pif[name][0]`` each scenario's.
    model_comparison
        One :class:`CurveVariant` per model in ``compare_models`` (the
        analysis's own model first), fitted to the same table.
    dose_sensitivity
        One :class:`CurveVariant` per dose-assignment rule, for a curve
        fitted to a study table.
    workers
        Per-worker cumulative exposure (core ``WorkerExposure``) when the
        exposure came from work histories, else ``None``.
    exposure_comparison
        For exposure fitted to data: the PAF under each family fitted and
        under the empirical distribution of the values (what the fit costs).
    burden
        Attributable cases by stratum and in total when ``[burden]`` is
        given, else ``None``.
    outcomes
        ``(name, Results)`` for each ``[[outcome]]``, side by side.
    substitution
        One :class:`SubstitutionResult` per fraction in ``[exposure]
        substitution`` (comparison only; never the main result).
    width_by_source
        One :class:`SourceWidth` per uncertain input that varies: the
        overall PAF's interval with only that input varying (the burden's
        total PAF when ``[burden]`` is given, else the PAF).
    width_all
        The same interval with every source varying, or ``None``.
    parametric_fits
        With ``family = "empirical"``: the parametric families fitted to
        the same values for comparison (core ``Exposure`` objects).
    """

    analysis: Any
    curve: Curve
    exposure: Exposure
    minimum_risk: float
    paf: Estimate
    scenarios: tuple[ScenarioResult, ...]
    categorical: CategoricalComparison
    contribution: Contribution
    warnings: tuple[str, ...] = ()
    cautions: tuple[str, ...] = ()
    band_table: BandTable | None = None
    notes: tuple[str, ...] = ()
    propagation: Any = None
    model_comparison: tuple[CurveVariant, ...] = ()
    dose_sensitivity: tuple[CurveVariant, ...] = ()
    workers: Any = None
    exposure_comparison: tuple[ExposureVariant, ...] = ()
    burden: BurdenResult | None = None
    outcomes: tuple[tuple[str, "Results"], ...] = ()
    substitution: tuple[SubstitutionResult, ...] = ()
    width_by_source: tuple[SourceWidth, ...] = ()
    width_all: SourceWidth | None = None
    parametric_fits: tuple[Exposure, ...] = ()
    extra: dict = field(default_factory=dict)

    # -- derived values -------------------------------------------------
    @property
    def title(self) -> str | None:
        return self.analysis.title

    @property
    def unit(self) -> str:
        return self.analysis.unit

    @property
    def minimum_risk_range(self) -> tuple[float, float] | None:
        return self.analysis.attribution.minimum_risk_range

    @property
    def share_beyond_max_dose(self) -> float | None:
        """Population share above ``curve.max_dose`` (where RR is held
        flat); ``None`` when the curve is extended without limit."""
        if self.curve.max_dose is None:
            return None
        return _scalar(self.exposure.sf(np.array([self.curve.max_dose])))

    @property
    def share_beyond_data(self) -> float | None:
        """Population share above the highest dose with data."""
        if self.curve.data_max is None:
            return None
        return _scalar(self.exposure.sf(np.array([self.curve.data_max])))

    @property
    def is_empirical(self) -> bool:
        """True when the exposure is the weighted values themselves."""
        return self.exposure.family.name == "empirical"

    @property
    def exposure_mean(self) -> float:
        """Population mean exposure, the unexposed counted at zero."""
        ex = self.exposure
        if self.is_empirical:
            return float(ex.mean())
        return (1.0 - ex.unexposed) * _scalar(ex.family.mean(ex.params))

    @property
    def zero_share(self) -> float:
        """Population share at zero exposure: the unexposed share, plus the
        weighted share of zeros among the values on the empirical path."""
        ex = self.exposure
        return float(ex.zero_share) if self.is_empirical else float(ex.unexposed)

    @property
    def model_curves(self) -> dict[str, Curve]:
        """``{model name: curve}`` for every model of ``compare_models``
        that could be fitted (the analysis's own model included)."""
        return {v.label: v.curve for v in self.model_comparison if v.curve is not None}

    def scenario_averted(self, name: str) -> Estimate | None:
        """Total averted cases of scenario ``name`` (``None`` without
        ``[burden]``)."""
        if self.burden is None:
            return None
        return next((a for n, _, a in self.burden.total.scenarios if n == name), None)

    # -- renderings -----------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """The ``results.json`` dictionary (JSON-safe: floats, lists, None)."""
        from doseattr import __version__

        d = {
            "schema_version": SCHEMA_VERSION,
            "doseattr_version": __version__,
            "title": self.title,
            "unit": self.unit,
            "paf": self.paf.to_dict(),
            "minimum_risk": _num(self.minimum_risk),
            "minimum_risk_range": (None if self.minimum_risk_range is None
                                   else [_num(v) for v in self.minimum_risk_range]),
            "scenarios": [self._scenario_dict(s) for s in self.scenarios],
            "curve": self._curve_dict(),
            "exposure": self._exposure_dict(),
            "categorical": self._categorical_dict(),
            "contribution": {"x": _nums(self.contribution.x),
                             "density": _nums(self.contribution.density),
                             "cumulative": _nums(self.contribution.cumulative),
                             "median": _num(self.contribution.median)},
            "bands": None if self.band_table is None else self.band_table.rows(),
            "uncertainty": self._uncertainty_dict(),
            "burden": None if self.burden is None else self.burden.to_dict(),
            "outcomes": [self._outcome_dict(name, r) for name, r in self.outcomes],
            "workers": self._workers_list(),
            "exposure_comparison": [v.to_dict() for v in self.exposure_comparison],
            "model_comparison": [v.to_dict() for v in self.model_comparison],
            "dose_sensitivity": [v.to_dict() for v in self.dose_sensitivity],
            "warnings": list(self.warnings),
            "cautions": list(self.cautions),
            "notes": list(self.notes),
            "provenance": self.provenance,
        }
        return json_safe(d)

    @cached_property
    def analysis_copy(self) -> tuple[str, bytes]:
        """``(kind, bytes)`` of the analysis as read once for this result:
        the file's bytes (``"file"``), or the canonical JSON of a dictionary
        analysis (``"python-dict"``); hashed in ``provenance``."""
        from doseattr.analysis.provenance import analysis_bytes

        return analysis_bytes(self.analysis)

    @cached_property
    def provenance(self) -> dict[str, Any]:
        """Versions, command (``"python-api"``), seed and the SHA-256 of the
        analysis and its tables (:mod:`doseattr.analysis.provenance`)."""
        from doseattr.analysis.provenance import provenance

        return provenance(self.analysis, source=self.analysis_copy)

    def write(self, out_dir: str | os.PathLike[str], *, figures: bool = True) -> list[Path]:
        """Write results.json, the CSV tables, figures, report.html, a copy
        of the analysis and manifest.json into ``out_dir``; return the files.

        Same folder rules as ``doseattr run --out``: ``out_dir`` must be new,
        empty, or hold only a previous doseattr run (checked against its
        manifest.json), which is then replaced as a whole; a folder holding
        any other file, the analysis file or one of its tables, the root or
        the home folder is refused (:class:`~doseattr.errors.InputError`).
        Nothing is changed when writing fails.
        """
        from doseattr.outputs.write import write_outputs  # the layer above, on use only

        return write_outputs(self, out_dir, figures=figures)

    def _scenario_dict(self, s: ScenarioResult) -> dict[str, Any]:
        """One scenario; ``averted`` is the burden's total averted cases."""
        averted = self.scenario_averted(s.name)
        return {"name": s.name, "kind": s.kind, "value": _num(s.value),
                "description": s.description, "pif": s.pif.to_dict(),
                "averted": None if averted is None else averted.to_dict()}

    @staticmethod
    def _outcome_dict(name: str, r: "Results") -> dict[str, Any]:
        """One outcome's results: the same keys as the top level."""
        d = r.to_dict()
        keep = ("paf", "minimum_risk", "scenarios", "curve", "categorical", "burden",
                "uncertainty", "model_comparison", "dose_sensitivity", "bands", "warnings",
                "notes")
        return {"name": name, **{k: d[k] for k in keep}}

    def _workers_list(self) -> list[dict[str, Any]] | None:
        w = self.workers
        if w is None:
            return None
        return [{"worker": str(name), "cumulative": _num(c), "duration_years": _num(d),
                 "mean_intensity": _num(m)}
                for name, c, d, m in zip(w.workers, w.cumulative, w.duration_years,
                                         w.mean_intensity)]

    def _uncertainty_dict(self) -> dict[str, Any] | None:
        u = self.analysis.uncertainty
        if u is None or self.propagation is None:
            return None
        return {"draws": int(u.draws), "seed": int(u.seed), "level": 0.95,
                "sources": [w.source for w in self.width_by_source],
                "width_by_source": [w.to_dict() for w in self.width_by_source],
                "width_all": None if self.width_all is None else self.width_all.to_dict()}

    def _curve_dict(self) -> dict[str, Any]:
        c = self.curve
        fit = c.fit
        fitted = []
        if fit is not None:
            fitted = [{"dose": _num(x), "rr_reported": _num(math.exp(y)),
                       "rr_fitted": _num(math.exp(f))}
                      for x, y, f in zip(fit.doses, fit.log_rr, fit.fitted_log_rr)]
        return {
            "model": c.model.name,
            "parameter_names": list(c.model.param_names),
            "coefficients": _nums(c.coef),
            "covariance": _matrix(c.cov),
            "standard_errors": _nums(np.sqrt(np.maximum(np.diag(c.cov), 0.0))),
            "reference_dose": _num(c.model.reference_dose),
            "max_dose": _num(c.max_dose),
            "beyond": "extend" if c.max_dose is None else "flat",
            "source": c.source,
            "data_max": _num(c.data_max),
            "covariance_method": None if fit is None else fit.covariance_method,
            "q": None if fit is None else _num(fit.q),
            "df": None if fit is None else int(fit.df),
            "p_value": None if fit is None else _num(fit.p_value),
            "nonlinearity_p": _num(_nonlinearity_p(c)),
            "fitted": fitted,
            "log_rr_covariance": None if fit is None else _matrix(fit.log_rr_covariance),
            "formula": c.model.describe(),
            "notes": list(c.notes),
        }

    def _fits_list(self) -> list[dict[str, Any]]:
        """Every parametric fit tried: the main one, the alternatives of
        ``family = "best"``, or the comparison fits of the empirical path."""
        ex = self.exposure
        tried = [(e.family, e.params, e.fit) for e in self.parametric_fits]
        if ex.fit is not None and ex.fit.loglik is not None:
            tried.insert(0, (ex.family, ex.params, ex.fit))
        tried += list(ex.alternatives)
        return [{"family": fam.name,
                 "parameters": _params(dict(zip(fam.param_names, np.asarray(params, float)))),
                 "loglik": _num(getattr(fit, "loglik", None)),
                 "aic": _num(getattr(fit, "aic", None)),
                 "goodness_of_fit": _gof(fit)} for fam, params, fit in tried]

    def _exposure_dict(self) -> dict[str, Any]:
        ex = self.exposure
        fit = ex.fit
        has_data = fit is not None and fit.n > 0
        return {
            "family": ex.family.name,
            "parameters": _params(ex.parameters),
            "unexposed": _num(self.zero_share),
            "share_beyond_max_dose": _num(self.share_beyond_max_dose),
            "share_beyond_data": _num(self.share_beyond_data),
            "mean": _num(self.exposure_mean),
            "source": ex.source,
            "n": int(fit.n) if has_data else None,
            "detected": int(fit.detected) if has_data else None,
            "censored": int(fit.censored) if has_data else None,
            "loglik": None if fit is None else _num(fit.loglik),
            "aic": None if fit is None else _num(fit.aic),
            "goodness_of_fit": _gof(fit),
            "fits": self._fits_list(),
            "substitution": [v.to_dict() for v in self.substitution],
            "notes": list(ex.notes),
        }

    def _categorical_dict(self) -> dict[str, Any]:
        cat = self.categorical
        return {
            "cutpoints": _nums(cat.cutpoints),
            "shares": _nums(cat.shares),
            "midpoints": _nums(cat.midpoints),
            "band_means": _nums(cat.band_means),
            "methods": [{"method": m.method, "rr": _nums(m.rr), "paf": _num(m.paf),
                         "difference": _num(m.difference)} for m in cat.methods],
            "continuous_paf": _num(cat.continuous_paf),
            "convergence": [{"bands": int(k), "paf": _num(p)} for k, p in cat.convergence],
        }

    def summary(self, brief: bool = False) -> str:
        """A readable text table of the key results.

        ``brief=True`` gives only the PAF and scenario lines (what the
        command line prints).
        """
        from doseattr.analysis.summary_text import render

        return render(self, brief=brief)

    def __repr__(self) -> str:
        return f"<Results PAF {_pct(self.paf.estimate)}, {len(self.scenarios)} scenario(s)>"


def _nonlinearity_p(curve: Curve) -> float | None:
    """p-value of the Wald test that a spline is linear (``None`` for other
    models): core :func:`~doseattr.core.curves.spline.nonlinearity_test`."""
    if curve.model.name != "spline":
        return None
    from doseattr.core.curves.spline import nonlinearity_test
    from doseattr.errors import ModelError

    try:
        return nonlinearity_test(curve)[2]
    except ModelError:
        return None


# -- JSON helpers -----------------------------------------------------------
def _scalar(value: Any) -> float:
    return float(np.asarray(value, dtype=float).reshape(-1)[0])


def _num(value: Any, *, open_ok: bool = False) -> float | None:
    """A plain float, or ``None`` for a missing value.

    ``open_ok`` turns an infinite or NaN value into ``None`` (used for the
    open upper limit of a band and the empty CI of the reference band,
    where "no number" is the meaning); anywhere else a non-finite value is
    an error.
    """
    if value is None:
        return None
    v = float(value)
    if not math.isfinite(v):
        if open_ok:
            return None
        raise ValueError(f"non-finite number {v} in results")
    return v


def _nums(values: Any) -> list[float | None]:
    return [_num(v) for v in np.asarray(values, dtype=float).reshape(-1)]


def _matrix(m: Any) -> list[list[float | None]]:
    a = np.atleast_2d(np.asarray(m, dtype=float))
    return [_nums(row) for row in a]


def _params(params: dict[str, Any]) -> dict[str, float | None]:
    return {k: _num(v) for k, v in params.items()}


def json_safe(obj: Any) -> Any:
    """Return ``obj`` with numpy scalars made plain; assert nothing
    non-finite and nothing of a type JSON cannot hold remains."""
    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        assert math.isfinite(v), f"non-finite number {v} in results"
        return v
    assert obj is None or isinstance(obj, str), f"not JSON-safe: {type(obj).__name__}"
    return obj


def _pct(v: float | None) -> str:
    return "-" if v is None else f"{100 * v:.2f}%"


def _g(v: float | None) -> str:
    return "-" if v is None else f"{v:.4g}"


def _gof(fit: Any) -> dict[str, Any] | None:
    """The fit's goodness-of-fit record (test, statistic, p_value, n, note),
    or ``None`` when the distribution was not fitted to measurements."""
    gof = getattr(fit, "gof", None)
    if not gof:
        return None
    return {"test": gof.get("test"), "statistic": _num(gof.get("statistic")),
            "p_value": _num(gof.get("p_value")), "n": int(gof.get("n") or 0),
            "note": gof.get("note")}
