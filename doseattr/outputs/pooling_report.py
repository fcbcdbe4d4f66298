"""The report's block on a pooled curve: the studies with their designs,
bands, covariance methods, coefficients and weights; the heterogeneity
statistics with a plain-language reading; the figure of the studies and
the pooled curve; what the Monte Carlo interval means.

Reads :class:`~doseattr.results.records.PoolingSection`.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from doseattr.outputs.markup import definition_list, figure, notes_list, num, para, pct, table
from doseattr.results.records import PooledStudy, PoolingSection

#: I^2 up to each bound and how it reads (Higgins et al. 2003, BMJ 327:557,
#: name 25%, 50% and 75% low, moderate and high; from memory).
I2_WORDS = ((0.25, "little heterogeneity: the studies agree about as well as their own "
                   "uncertainty allows"),
            (0.50, "low to moderate heterogeneity"),
            (0.75, "moderate heterogeneity: the studies' curves differ by more than chance"),
            (1.01, "high heterogeneity: most of the spread between the studies' coefficients "
                   "is real difference between them, not chance"))
#: Cochran's Q test has little power with few studies; 0.10 is the usual
#: level (common practice).
Q_LEVEL = 0.10


def pooling_block(p: PoolingSection | None, unit: str | None,
                  images: Mapping[str, bytes]) -> str:
    """The block's HTML; empty for a curve that was not pooled."""
    if p is None:
        return ""
    r = p.pooled
    how = ("fixed effect (inverse-variance generalized least squares, no between-study "
           "variation)" if r.method == "fixed" else
           f"random effects, the between-study variance by "
           f"{'REML' if r.tau_method == 'reml' else 'DerSimonian-Laird'}")
    parts = [para(f"The curve pools {len(p.studies)} studies in two stages: each study's "
                  "bands were fitted on their own by generalized least squares with that "
                  "study's covariance of the log RRs, then the coefficients were pooled by "
                  f"{how}."),
             studies_table(p, unit), heterogeneity_block(p),
             para(_draws_text(p))]
    caption = ("Each study's fitted curve over its own doses (dashed) with its band estimates "
               "and reported 95% CIs, and the pooled curve with its pointwise 95% interval")
    if p.prediction is not None:
        caption += " and, lighter, the 95% prediction interval of a new population's curve"
    parts.append(figure(images, "pooled", caption + "."))
    parts.append(notes_list(r.notes))
    return "".join(x for x in parts if x)


def studies_table(p: PoolingSection, unit: str | None) -> str:
    """One row per study and one for the pooled estimate."""
    names = list(p.mean.model.param_names)
    what = "Slope (SE)" if len(names) == 1 else f"Coefficients {', '.join(names)} (SE)"
    u = f" ({unit})" if unit else ""
    rows = [[s.name, s.design or "not given", _bands_text(s), s.covariance_method,
             _coefficients(s.curve.coef, s.curve.cov), pct(s.weight)] for s in p.studies]
    rows.append(["Pooled", "", "", "", _coefficients(p.pooled.coefficients,
                                                     p.pooled.covariance), pct(1.0)])
    return table(["Study", "Design", f"Bands{u}", "Covariance of log RRs", what, "Weight"],
                 rows, caption="Studies pooled")


def heterogeneity_block(p: PoolingSection) -> str:
    """tau^2, Q, I^2 and the test of non-linearity, then what they mean."""
    r = p.pooled
    facts = [("Between-study variance tau\u00b2", _tau2_text(r.tau2)),
             ("Cochran's Q", f"{num(r.q, 4)} on {r.df} degrees of freedom, "
                             f"p = {num(r.p_value, 3)}"),
             ("I\u00b2", pct(r.i2))]
    if p.nonlinearity is not None:
        w, df, pv = p.nonlinearity
        facts.append(("Non-linearity of the pooled spline (Wald)",
                      f"W = {num(w, 4)} on {df} df, p = {num(pv, 3)}"))
    return definition_list(facts) + para(heterogeneity_reading(p))


def heterogeneity_reading(p: PoolingSection) -> str:
    """The statistics in plain words."""
    r = p.pooled
    words = next(text for bound, text in I2_WORDS if r.i2 < bound)
    text = f"I\u00b2 = {pct(r.i2)}: {words}."
    if r.p_value < Q_LEVEL:
        text += (f" Cochran's Q test finds the studies differ (p = {num(r.p_value, 3)} "
                 f"< {Q_LEVEL:g}).")
    else:
        text += (f" Cochran's Q test finds no clear difference (p = {num(r.p_value, 3)}), "
                 f"but with {len(p.studies)} studies it has little power to find one.")
    if np.ndim(r.tau2) == 0 and float(r.tau2) > 0:
        tau = float(np.sqrt(float(r.tau2)))
        text += (f" The studies' true slopes spread about the pooled slope "
                 f"{num(float(r.coefficients[0]), 4)} with a standard deviation of "
                 f"{num(tau, 3)}.")
    if r.method == "fixed" and r.i2 > 0:
        text += (" Fixed-effect pooling assumes one true curve for every study; with "
                 "heterogeneity its interval is too narrow.")
    if p.nonlinearity is not None:
        text += (" The pooled spline departs from a straight line on the log-RR scale."
                 if p.nonlinearity[2] < 0.05 else
                 " The pooled spline gives no clear evidence against a straight line on the "
                 "log-RR scale.")
    return text


def _draws_text(p: PoolingSection) -> str:
    if p.predict:
        return ("The Monte Carlo draws a new population's curve (predict = true): the "
                "pooled coefficients' covariance plus the between-study variance tau\u00b2. "
                "Its interval includes how much curves differ between populations; use it "
                "for a population that is not one of the studies'.")
    return ("The Monte Carlo draws the pooled coefficients from their own uncertainty: the "
            "interval is that of the average curve of the studies' populations and leaves out "
            "how much any one population's curve differs from it (set [curve] predict = true "
            "to include it).")


def _bands_text(s: PooledStudy) -> str:
    b = s.bands
    dose = np.asarray(b.dose, float)
    return f"{len(b.rr)} bands, doses {num(float(dose.min()))} to {num(float(dose.max()))}"


def _coefficients(coef: np.ndarray, cov: np.ndarray) -> str:
    se = np.sqrt(np.maximum(np.diag(np.atleast_2d(cov)), 0.0))
    return ", ".join(f"{num(float(b), 4)} ({num(float(e), 3)})" for b, e in zip(coef, se))


def _tau2_text(tau2: float | np.ndarray) -> str:
    if np.ndim(tau2) == 0:
        return num(float(tau2), 4)
    diag = np.diag(np.asarray(tau2, float))
    return ("a matrix; its diagonal (one variance per coefficient) is "
            + ", ".join(num(float(v), 3) for v in diag)
            + ("" if np.any(diag > 0) else " (no heterogeneity found)"))

