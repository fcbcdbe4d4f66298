"""Fixed wording of the report: explanations, methods and references.

Kept apart from the page layout so the text can be read and revised in one
place. The cautions shown in a report are those of the results
(``results.cautions``, worded once in :mod:`doseattr.results.cautions`).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from doseattr.core.exposure.registry import unit_parameters
from doseattr.results.records import METHOD_TEXT, PoolingSection

if TYPE_CHECKING:  # pragma: no cover
    from doseattr.results import Results

#: What each way of building the covariance of the study's log RRs means.
COVARIANCE_MEANING = {
    "counts": (
        "The band estimates share one reference group, so they are correlated; the "
        "correlation was reconstructed from the study's counts by the method of Greenland & "
        "Longnecker (1992), keeping the reported variances on the diagonal."),
    "effective-counts": (
        "Effective counts consistent with the reported RRs and confidence intervals "
        "(Hamling et al. 2008), built from the table's own totals where it gives them (the "
        "notes say which), were used to reconstruct the correlation between the band "
        "estimates."),
    "independent": (
        "The band estimates were treated as uncorrelated because no counts could be used. "
        "They share one reference group and are in fact correlated, so the coefficient and "
        "its standard error may be somewhat off."),
    "entered": "The curve was entered as published; its variance comes from the published "
               "confidence interval.",
}

#: Exposure parameters and summary statistics that carry the exposure unit
#: (declared by the core's families; the others are pure numbers).
UNIT_PARAMETERS = unit_parameters()

METHODS_TEXT = (
    "Relative-risk curve. A curve fitted from a study's category-level estimates uses one "
    "assigned dose per band and regresses the log relative risks on dose by generalized "
    "least squares through the reference band (RR = 1 at the reference dose), with the "
    "covariance of the log RRs reconstructed from the study's counts where they are given "
    "(Greenland & Longnecker 1992). The goodness-of-fit statistic Q = r'V\u207b\u00b9r is "
    "compared with a chi-square distribution on (bands \u2212 coefficients) degrees of "
    "freedom.",
    "Exposure distribution. Measurements are fitted by weighted maximum likelihood; values "
    "below a detection limit enter as left-censored at their limit, never replaced by a "
    "fraction of it. Distributions may also be set from summary statistics (GM and GSD, "
    "mean and SD by moments) or entered directly; an unexposed share is a point mass at "
    "zero exposure.",
    "Attributable fractions. Against a minimum-risk level m, RR_m(x) = RR(max(x, m)) / RR(m); "
    "PAF = 1 \u2212 1/E[RR_m(X)] and, for a scenario that changes exposure x to g(x), "
    "PIF = 1 \u2212 E[RR_m(g(X))]/E[RR_m(X)], the comparative-risk-assessment fractions "
    "(Murray et al. 2003). Expectations are computed by numerical quadrature over the "
    "fitted distribution; expectations that have no finite value are refused.",
    "Categorical comparison. The multi-category formula PAF = \u03a3 p_i(RR_i \u2212 1) / "
    "(1 + \u03a3 p_i(RR_i \u2212 1)) (Rockhill, Newman & Weinberg 1998; Hanley 2001) is the "
    "generalisation of Levin's (1953) formula for one exposed level.",
)

BASE_REFERENCES = (
    "Levin ML (1953). The occurrence of lung cancer in man. Acta Unio Internationalis Contra "
    "Cancrum 9:531. \u2020",
    "Miettinen OS (1974). Proportion of disease caused or prevented by a given exposure, "
    "trait or intervention. Am J Epidemiol 99:325. \u2020",
    "Greenland S, Longnecker MP (1992). Methods for trend estimation from summarized "
    "dose-response data, with applications to meta-analysis. Am J Epidemiol 135:1301.",
    "Rockhill B, Newman B, Weinberg C (1998). Use and misuse of population attributable "
    "fractions. Am J Public Health 88:15.",
    "Hanley JA (2001). A heuristic approach to the formulas for population attributable "
    "fraction. J Epidemiol Community Health 55:508.",
    "Murray CJL, Ezzati M, Lopez AD, Rodgers A, Vander Hoorn S (2003). Comparative "
    "quantification of health risks: conceptual framework and methodological issues. "
    "Popul Health Metr 1:1. \u2020",
)

EXTRA_REFERENCES = {
    "effective-counts": "Hamling J, Lee P, Weitkunat R, Amb\u00fchl M (2008). Facilitating "
                        "meta-analyses by deriving relative effect and precision estimates "
                        "for alternative comparisons from a set of estimates presented by "
                        "exposure level or disease category. Stat Med 27:954. \u2020",
    "spline": "Harrell FE Jr. Regression Modeling Strategies (Springer): restricted cubic "
              "splines and default knot positions.",
    "censored": "Helsel DR (2012). Statistics for Censored Environmental Data Using Minitab "
                "and R, 2nd ed. Wiley. \u2020",
    "aic": "Akaike H (1974). A new look at the statistical model identification. IEEE Trans "
           "Automat Control 19:716. \u2020",
}

#: How each ``[burden] method`` is named in the report's sentences.
BURDEN_METHOD_NAMES = {"paf": "the PAF method", "impact-function": "the health impact function"}

#: The methods section's paragraph on turning fractions into cases (shown
#: with a burden table). The ordering of the two follows from Jensen's
#: inequality: 1/x is convex, so E[1/RR] >= 1/E[RR].
BURDEN_METHODS_TEXT = (
    "Attributable cases. Two ways turn fractions into cases, chosen by [burden] method. "
    "\u201cpaf\u201d (the default): attributable = observed cases \u00d7 PAF with PAF = "
    "1 \u2212 1/E[RR_m(X)], which takes the observed rate as the rate of the whole exposed "
    "population (comparative risk assessment; Murray et al. 2003, Popul Health Metr 1:1). "
    "\u201cimpact-function\u201d: attributable = observed cases \u00d7 E[1 \u2212 "
    "1/RR_m(X)], the health impact function applied to each person's own exposure, which "
    "takes the observed rate as the rate at each person's exposure (as in air-quality "
    "impact assessments: Ostro 2004; Anenberg et al. 2010; both cited from memory). "
    "Because 1/x is convex, E[1/RR] \u2265 1/E[RR] "
    "(Jensen's inequality), so for the same cases the health impact function never gives "
    "more attributable cases than the PAF method; the two agree when everyone has the same "
    "exposure. With a population, a rate is per rate_per people: attributable rate = "
    "attributable cases / population \u00d7 rate_per. Every total (a group across strata, "
    "a stratum across its groups, an outcome, all outcomes) is a sum draw by draw, so its "
    "interval is that of the summed draws, not a sum of limits.")

#: Shown wherever years of life lost are.
YLL_NOTE = (
    "Years of life lost (YLL) are deaths-based: attributable deaths \u00d7 the remaining "
    "life expectancy at each row's age, from the life table the user supplied, summed like "
    "the cases; they are neither discounted nor age-weighted. Outcomes that are not deaths "
    "(new cases, admissions) should not carry a life expectancy.")

#: Shown beside the total across outcomes.
GRAND_TOTAL_CAUTION = (
    "The total across outcomes adds the outcomes' attributable cases and years of life lost "
    "draw by draw; it is meaningful only when the outcomes do not overlap (all-cause and "
    "cause-specific deaths, for example, count the same deaths twice). These numbers "
    "support, and do not replace, local regulations and the advice of licensed "
    "professionals.")

IMPACT_REFERENCE = (
    "Ostro B (2004). Outdoor air pollution: assessing the environmental burden of disease at "
    "national and local levels. WHO Environmental Burden of Disease Series No. 5. Geneva: "
    "World Health Organization. \u2020 Anenberg SC, Horowitz LW, Tong DQ, West JJ (2010). An "
    "estimate of the global burden of anthropogenic ozone and fine particulate matter on "
    "premature human mortality using atmospheric modeling. Environ Health Perspect "
    "118:1189-1195. \u2020")

#: Kept for callers that want the fixed list.
REFERENCES = BASE_REFERENCES


def references(results: Results) -> list[str]:
    """The fixed references plus those the analysis used."""
    refs = list(BASE_REFERENCES)
    curve = results.curve
    if curve.fit is not None and curve.fit.covariance_method == "effective-counts":
        refs.append(EXTRA_REFERENCES["effective-counts"])
    models = [curve.model.name] + [v.curve.model.name for v in results.model_comparison
                                   if v.curve is not None]
    if "spline" in models:
        refs.append(EXTRA_REFERENCES["spline"])
    e = results.exposure_section
    fit = e.exposure.fit
    if (fit is not None and fit.n > 0 and fit.censored) or e.substitution:
        refs.append(EXTRA_REFERENCES["censored"])
    if len(e.fits) > 1:
        refs.append(EXTRA_REFERENCES["aic"])
    if results.burden_blocks:
        refs.append(IMPACT_REFERENCE)
    return refs + pooling_references(results.curve_section.pooling)


#: References of a pooled curve ([[curve.study]]), by what the run used.
POOLING_REFERENCES = {
    "dl": "DerSimonian R, Laird N (1986). Meta-analysis in clinical trials. Control Clin "
          "Trials 7:177. \u2020",
    "dl-multivariate": "Jackson D, White IR, Thompson SG (2010). Extending DerSimonian and "
                       "Laird's methodology to perform multivariate random effects "
                       "meta-analyses. Stat Med 29:1282. \u2020",
    "reml": "Viechtbauer W (2005). Bias and efficiency of meta-analytic variance estimators "
            "in the random-effects model. J Educ Behav Stat 30:261. \u2020",
    "reml-multivariate": "Jackson D, Riley RD, White IR (2011). Multivariate meta-analysis: "
                         "potential and promise. Stat Med 30:2481. \u2020",
    "reml-multivariate-2": "Gasparrini A, Armstrong B, Kenward MG (2012). Multivariate "
                           "meta-analysis for non-linear and other multi-parameter "
                           "associations. Stat Med 31:3821. \u2020",
    "i2": "Higgins JPT, Thompson SG (2002). Quantifying heterogeneity in a meta-analysis. "
          "Stat Med 21:1539. \u2020",
    "predict": "Higgins JPT, Thompson SG, Spiegelhalter DJ (2009). A re-evaluation of "
               "random-effects meta-analysis. J R Stat Soc A 172:137. \u2020",
}


def pooling_references(p: PoolingSection | None) -> list[str]:
    """What a pooled curve used: the between-study variance's method (for
    one coefficient or several), I^2 and, with ``predict``, the predictive
    distribution."""
    if p is None:
        return []
    multi = p.pooled.coefficients.size > 1
    keys = {"dl": ["dl", "dl-multivariate"] if multi else ["dl"],
            # the REML search starts from the DerSimonian-Laird estimate
            "reml": ["dl", "reml-multivariate", "reml-multivariate-2"] if multi
            else ["dl", "reml"]}.get(str(p.pooled.tau_method), [])
    keys.append("i2")
    if p.predict:
        keys.append("predict")
    return [POOLING_REFERENCES[k] for k in keys]


def burden_methods(results: Results) -> tuple[str, ...]:
    """The methods section's paragraphs on attributable cases, rates and
    years of life lost: none without a burden table, the YLL note only when
    some burden table has years of life lost."""
    blocks = results.burden_blocks
    if not blocks:
        return ()
    yll = any(b.has_yll for _, b in blocks) or (
        results.grand_total is not None and results.grand_total.yll is not None)
    return (BURDEN_METHODS_TEXT,) + ((YLL_NOTE,) if yll else ())


def method_sentence(method: str, outcome: str | None = None) -> str:
    """Which way from fractions to cases a burden table used and what it
    assumes (:data:`~doseattr.results.records.METHOD_TEXT`)."""
    whose = f"For {outcome}, attributable" if outcome else "Attributable"
    name = BURDEN_METHOD_NAMES.get(method, method)
    what = METHOD_TEXT.get(method, "")
    how = f"{whose} cases were computed by {name} ([burden] method = \u201c{method}\u201d)"
    return f"{how}: {what}." if what else f"{how}."


def computed_paragraph(results: Results) -> str:
    """One paragraph saying what was computed."""
    c, unit = results.curve, results.unit or ""
    m_text = f"{_g(results.minimum_risk)} {unit}".strip()
    source = {"fitted": "fitted to a study's category-level estimates",
              "pooled": "pooled from several studies' category-level estimates"}.get(
        str(c.source), "entered as published")
    n = len(results.scenarios)
    text = (f"This report combines a {c.model.name} relative-risk curve ({source}) with "
            f"the {results.exposure.family.name} distribution of exposure in the population to "
            f"estimate the share of cases attributable to exposure above the minimum-risk level "
            f"of {m_text} (the population attributable fraction, PAF)")
    if n:
        text += (f", the share that each of {n} exposure-reduction scenario"
                 f"{'s' if n != 1 else ''} would prevent (the potential impact fraction, PIF)")
    text += ", and how the classic multi-category formula compares with the continuous result"
    return text + "."


def _g(value: float) -> str:
    return f"{float(value):g}"
