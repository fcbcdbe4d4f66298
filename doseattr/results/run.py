"""The record of one finished run (:class:`Results`): its sections, the
warnings, notes and cautions, and what the run read.

``results.json`` is generated from these records in one place,
:mod:`doseattr.results.serialize`; the text summary is
:mod:`doseattr.results.summary`.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from doseattr.core.attribution.categorical import CategoricalComparison
from doseattr.core.attribution.contribution import Contribution
from doseattr.core.curves.base import Curve
from doseattr.core.exposure.base import Exposure
from doseattr.results.cautions import CAUTIONS
from doseattr.results.estimate import Estimate
from doseattr.results.numbers import pct
from doseattr.results.records import (
    AnyExposure,
    AttributionSection,
    BandTable,
    BurdenBlock,
    BurdenResult,
    CurveSection,
    CurveVariant,
    ExposureSection,
    ExposureVariant,
    GridSection,
    LimitSection,
    RunInputs,
    ScenarioResult,
    SourceWidth,
    StratumResult,
    SubstitutionResult,
    UncertaintySection,
    Workers,
    burden_blocks,
)


@dataclass(frozen=True, eq=False)
class Results:
    """Everything one run produced.

    Attributes
    ----------
    title, unit
        The analysis title (or ``None``) and its exposure unit.
    curve_section, exposure_section
        The curve and the exposure with their fits and comparisons.
    attribution
        PAF, minimum-risk level, scenarios and the burden's distribution
        over exposure.
    categorical
        The multi-category comparison (core ``CategoricalComparison``).
    uncertainty
        What ``[uncertainty]`` ran and the interval by source, or ``None``.
    burden
        Attributable cases by stratum and in total, or ``None``.
    outcomes
        ``(name, Results)`` for each ``[[outcome]]``, side by side.
    grand_total
        Attributable cases, rates and years of life lost summed over every
        outcome's burden draw by draw (``None`` without outcomes with
        ``[burden]``).
    grid
        What a ``[grid]`` analysis read (zones, cells, maps), or ``None``.
    limit
        Compliance with ``[limit]`` (exceedance, 95th percentile, mean,
        the decision, workers), or ``None``.
    group_runs
        For an outcome with group-specific curves: ``(groups, Results)``
        of each curve (its curve, population PAF and rows); empty otherwise.
    warnings, cautions, notes
        Problems with this run; the standing cautions on interpreting any
        PAF; how inputs were interpreted.
    inputs
        Provenance and the analysis as read (``None`` for a record built
        by hand, which then cannot be written).
    """

    title: str | None
    unit: str
    curve_section: CurveSection
    exposure_section: ExposureSection
    attribution: AttributionSection
    categorical: CategoricalComparison
    uncertainty: UncertaintySection | None = None
    burden: BurdenResult | None = None
    outcomes: tuple[tuple[str, Results], ...] = ()
    grand_total: StratumResult | None = None
    group_runs: tuple[tuple[tuple[str, ...], Results], ...] = ()
    grid: GridSection | None = None
    limit: LimitSection | None = None
    warnings: tuple[str, ...] = ()
    cautions: tuple[str, ...] = CAUTIONS
    notes: tuple[str, ...] = ()
    inputs: RunInputs | None = None

    # -- the sections' main values, by their usual names ------------------
    @property
    def curve(self) -> Curve:
        return self.curve_section.curve

    @property
    def exposure(self) -> AnyExposure:
        return self.exposure_section.exposure

    @property
    def paf(self) -> Estimate:
        return self.attribution.paf

    @property
    def minimum_risk(self) -> float:
        return self.attribution.minimum_risk

    @property
    def minimum_risk_range(self) -> tuple[float, float] | None:
        return self.attribution.minimum_risk_range

    @property
    def scenarios(self) -> tuple[ScenarioResult, ...]:
        return self.attribution.scenarios

    @property
    def contribution(self) -> Contribution:
        return self.attribution.contribution

    @property
    def band_table(self) -> BandTable | None:
        return self.curve_section.bands

    @property
    def model_comparison(self) -> tuple[CurveVariant, ...]:
        return self.curve_section.model_comparison

    @property
    def dose_sensitivity(self) -> tuple[CurveVariant, ...]:
        return self.curve_section.dose_sensitivity

    @property
    def exposure_comparison(self) -> tuple[ExposureVariant, ...]:
        return self.exposure_section.comparison

    @property
    def substitution(self) -> tuple[SubstitutionResult, ...]:
        return self.exposure_section.substitution

    @property
    def workers(self) -> Workers | None:
        return self.exposure_section.workers

    @property
    def parametric_fits(self) -> tuple[Exposure, ...]:
        return self.exposure_section.parametric_fits

    @property
    def propagation(self) -> Any:
        """The core's Monte Carlo draws, or ``None`` without uncertainty."""
        return None if self.uncertainty is None else self.uncertainty.propagation

    @property
    def width_by_source(self) -> tuple[SourceWidth, ...]:
        return () if self.uncertainty is None else self.uncertainty.width_by_source

    @property
    def width_all(self) -> SourceWidth | None:
        return None if self.uncertainty is None else self.uncertainty.width_all

    @property
    def share_beyond_max_dose(self) -> float | None:
        return self.curve_section.share_beyond_max_dose

    @property
    def share_beyond_data(self) -> float | None:
        return self.curve_section.share_beyond_data

    @property
    def is_empirical(self) -> bool:
        return self.exposure_section.is_empirical

    @property
    def exposure_mean(self) -> float:
        return self.exposure_section.mean

    @property
    def zero_share(self) -> float:
        return self.exposure_section.zero_share

    @property
    def model_curves(self) -> dict[str, Curve]:
        """``{model name: curve}`` for every model of ``compare_models``
        that could be fitted (the analysis's own model included)."""
        return {v.label: v.curve for v in self.model_comparison if v.curve is not None}

    @property
    def provenance(self) -> dict[str, Any]:
        """The ``provenance`` record of results.json (empty for a record
        built by hand)."""
        return {} if self.inputs is None else dict(self.inputs.provenance)

    @property
    def analysis_copy(self) -> tuple[str, bytes] | None:
        """``(kind, bytes)`` of the analysis as read, or ``None``."""
        return None if self.inputs is None else (self.inputs.copy_kind, self.inputs.copy_bytes)

    @property
    def burden_blocks(self) -> list[BurdenBlock]:
        """Every burden table of the run (:func:`~doseattr.results.records.burden_blocks`)."""
        return burden_blocks(self.burden, [(n, o.burden) for n, o in self.outcomes])

    def scenario_averted(self, name: str) -> Estimate | None:
        """Total averted cases of scenario ``name`` (``None`` without
        ``[burden]``)."""
        if self.burden is None:
            return None
        return next((e.averted for e in self.burden.total.scenarios if e.name == name), None)

    # -- renderings -----------------------------------------------------
    def to_dict(self) -> dict[str, Any]:
        """The ``results.json`` dictionary (:mod:`doseattr.results.serialize`)."""
        from doseattr.results.serialize import results_dict

        return results_dict(self)

    def summary(self, brief: bool = False) -> str:
        """A readable text table of the key results; ``brief=True`` gives
        only the PAF and scenario lines (what the command line prints)."""
        from doseattr.results.summary import render

        return render(self, brief=brief)

    def write(self, out_dir: str | os.PathLike[str], *, figures: bool = True) -> list[Path]:
        """Write results.json, the CSV tables, figures, report.html, a copy
        of the analysis and manifest.json into ``out_dir``; return the files.

        Same folder rules as ``doseattr run --out``
        (:func:`doseattr.outputs.write.write_outputs`, which this calls).
        """
        # The one call upward (the outputs layer), made on use only; listed
        # in tests/test_layers.py as the allowed exception.
        from doseattr.outputs.write import write_outputs

        return write_outputs(self, out_dir, figures=figures)

    def to_frames(self) -> dict[str, Any]:
        """The CSV tables of :meth:`write` as pandas DataFrames, by file name
        without ``.csv`` (``"summary"``, ``"scenarios"``, ...): each is what
        ``pandas.read_csv`` gives for the file written."""
        import csv
        import io

        import pandas as pd

        # A call upward on use only, like write(); listed in tests/test_layers.py.
        from doseattr.outputs.tables import all_tables, cell

        frames = {}
        for name, (header, rows) in all_tables(self).items():
            text = io.StringIO()
            writer = csv.writer(text, lineterminator="\n")
            writer.writerow(header)
            writer.writerows([cell(v) for v in row] for row in rows)
            text.seek(0)
            frames[name.removesuffix(".csv")] = pd.read_csv(text)
        return frames

    def _repr_html_(self) -> str:
        """The report's table of key numbers, for notebooks."""
        # A call upward on use only, like write(); listed in tests/test_layers.py.
        from doseattr.outputs.report import key_numbers

        html: str = key_numbers(self)
        return html

    def __repr__(self) -> str:
        return f"<Results PAF {pct(self.paf.estimate)}, {len(self.scenarios)} scenario(s)>"
