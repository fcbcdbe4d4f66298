r"""Within- and between-worker variation of personal exposure samples.

The one-way random-effects model on the log scale (Rappaport & Kupper 2008,
Quantitative Exposure Assessment; Rappaport 1991, Ann Occup Hyg 35:61;
from memory): sample ``j`` of worker ``i`` is

.. math::

    \ln x_{ij} = \mu + b_i + e_{ij}, \qquad
    b_i \sim N(0, \sigma_b^2), \quad e_{ij} \sim N(0, \sigma_w^2),

so worker ``i``'s long-term arithmetic mean exposure is
:math:`e^{\mu + b_i + \sigma_w^2/2}`, lognormal over workers with
``GM = exp(mu + sw^2/2)`` and ``GSD = exp(sb)``.

Maximum likelihood. A non-detect (``detected`` false; its value is the
detection limit ``L``) contributes :math:`\Phi((\ln L - \mu - b_i)/\sigma_w)`
given ``b_i``. Each worker's likelihood is

.. math::

    L_i = \int e^{g_i(b)}\,db, \qquad
    g_i(b) = \sum_j \ln f(y_{ij} \mid b) + \ln \phi(b/\sigma_b) - \ln \sigma_b .

With nothing censored the integral is the normal marginal likelihood
:math:`y_i \sim N(\mu 1, \sigma_w^2 I + \sigma_b^2 J)` in closed form
(determinant :math:`\sigma_w^{2(n_i-1)} (\sigma_w^2 + n_i \sigma_b^2)`,
derived). Otherwise ``g_i`` is strictly concave (log-concavity of the normal
density and CDF), and the integral is taken in the variable ``r`` with
:math:`g_i(\hat b) - g_i(b) = r^2`, ``sign(r) = sign(b - b_hat)`` at the
mode ``b_hat``:

.. math::

    L_i = e^{g_i(\hat b)} \int e^{-r^2} \frac{db}{dr}\,dr, \qquad
    \frac{db}{dr} = \frac{-2r}{g_i'(b(r))},

which is exact for a normal integrand (``db/dr`` constant). Censoring can
make the integrand lopsided (a worker with only non-detects and a
between-worker SD much larger than the within-worker SD falls steeply on
one side of its mode and slowly on the other), where ``db/dr`` changes
abruptly near ``r = 0`` and Gauss-Hermite with one scale at the mode
(adaptive Gauss-Hermite; Liu & Pierce 1994, Biometrika 81:624, from memory)
errs by 1e-2 in ``ln L_i``; a composite Gauss-Legendre rule on panels
graded towards ``r = 0`` (:func:`graded_rule`) keeps such cases within
about 1e-9 of ``scipy.integrate.quad``.
Internal parameters are ``(mu, ln sb, ln sw)``; the gradient is analytic
(posterior means of the integrand's scores), the covariance the inverse
observed information by central differences of that gradient.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import cast

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.optimize import minimize
from scipy.special import log_ndtr, logsumexp, ndtr, ndtri

from doseattr.core.exposure.base import Exposure, ExposureFit, FloatArray, check_usable
from doseattr.core.exposure.lognormal import LogNormal, ndtr_between
from doseattr.core.exposure.mle import NOT_POSITIVE, Maximum, maximise
from doseattr.errors import FitError, ModelError

IntArray = NDArray[np.intp]
BoolArray = NDArray[np.bool_]

_LOG_SQRT_2PI = 0.5 * np.log(2 * np.pi)
#: A between-worker SD below this multiple of the within-worker SD is
#: reported as 0 (the boundary of the parameter space).
BOUNDARY_RATIO = 1e-3

METHOD = ("one-way random-effects model for ln exposure (worker effect and day-to-day "
          "variation; Rappaport & Kupper 2008, Quantitative Exposure Assessment, from memory), "
          "maximum likelihood")

#: The caution when samples carry no worker identifier.
WITHIN_WORKER_NOTE = (
    "samples are not identified by worker: the fitted distribution is that of single "
    "samples, which day-to-day (within-worker) variation makes wider than the distribution "
    "of workers' long-term mean exposures; with repeated samples per worker, separate the "
    "two with a random-effects model (doseattr.core.hygiene.workers.fit_workers)")

#: What a cohort's dose-response refers to.
LONG_TERM_NOTE = (
    "distribution of workers' long-term arithmetic mean exposure exp(mu + b_i + sw^2/2) "
    "over workers, from a random-effects fit: a cohort's dose-response relates disease to "
    "long-term mean (cumulative) exposure, not to single samples")


#: How the per-worker summaries are obtained.
EMPIRICAL_BAYES_NOTE = ("worker summaries are empirical Bayes: posterior given the estimated mu, "
                        "sb and sw, without their uncertainty")


def within_worker_note() -> str:
    """The caution for samples without a worker column (:data:`WITHIN_WORKER_NOTE`)."""
    return WITHIN_WORKER_NOTE


@dataclass(frozen=True)
class WorkerEstimate:
    """One worker's posterior summary, given the fitted ``mu, sb, sw``
    (empirical Bayes: the uncertainty of those estimates is not included).

    ``mean_log`` and ``sd_log`` are the posterior mean and SD of
    ``mu + b_i`` (the BLUP when nothing is censored); ``long_term_mean`` is
    the posterior mean :math:`E[e^{\\mu + b_i + \\sigma_w^2/2} \\mid data]`
    (not the plug-in at the BLUP), and ``lower``/``upper`` the equal-tailed
    posterior interval of that long-term mean at ``level``.
    """

    worker: str
    n: int
    n_censored: int
    mean_log: float
    sd_log: float
    long_term_mean: float
    lower: float
    upper: float
    level: float


@dataclass(frozen=True)
class WorkerModel:
    """A fitted random-effects model (module docstring).

    ``cov`` is the 3x3 asymptotic covariance of ``(mu, ln sb, ln sw)`` or
    ``None`` (at the boundary ``sb = 0``, or when the information is not
    positive definite; ``notes`` says which).
    """

    mu: float
    sigma_within: float
    sigma_between: float
    loglik: float
    cov: FloatArray | None
    n_samples: int
    n_workers: int
    n_censored: int
    method: str
    notes: tuple[str, ...]
    workers: tuple[WorkerEstimate, ...]
    at_boundary: bool = False

    @property
    def gsd_within(self) -> float:
        return float(np.exp(self.sigma_within))

    @property
    def gsd_between(self) -> float:
        return float(np.exp(self.sigma_between))

    @property
    def icc(self) -> float:
        """Share of the log-scale variance between workers, sb^2 / (sb^2 + sw^2)."""
        vb, vw = self.sigma_between ** 2, self.sigma_within ** 2
        return vb / (vb + vw)


# -- data -----------------------------------------------------------------

@dataclass(frozen=True)
class Samples:
    """Log values sorted by worker: worker ``i`` holds rows
    ``starts[i] : starts[i] + n[i]``; ``code`` is each row's worker.

    Detected values enter the worker integrals only through their count
    ``n_det``, mean ``ybar_det`` and sum of squares about it ``ss_det`` per
    worker; non-detects (rows ``cens``, grouped by :meth:`cens_sum`) one by
    one."""

    y: FloatArray
    detected: BoolArray
    code: IntArray
    starts: IntArray
    n: IntArray
    labels: tuple[str, ...]
    n_det: FloatArray
    ybar_det: FloatArray
    ss_det: FloatArray
    cens: IntArray
    cens_workers: IntArray
    cens_starts: IntArray

    @property
    def n_workers(self) -> int:
        return len(self.labels)

    def worker_sum(self, a: FloatArray) -> FloatArray:
        """Per-worker sums of a per-row array (rows first)."""
        return cast(FloatArray, np.add.reduceat(a, self.starts, axis=0))

    def per_row(self, b: FloatArray) -> FloatArray:
        """A per-worker array repeated for each row."""
        return cast(FloatArray, b[self.code])

    def cens_sum(self, a: FloatArray) -> FloatArray:
        """Per-worker sums of an array over the non-detect rows (0 for a
        worker without non-detects)."""
        out = np.zeros((self.n_workers, *a.shape[1:]))
        if self.cens.size:
            out[self.cens_workers] = np.add.reduceat(a, self.cens_starts, axis=0)
        return out


def _group(code: IntArray) -> tuple[IntArray, IntArray]:
    """Distinct values of a sorted code and where each starts."""
    workers, starts = np.unique(code, return_index=True)
    return workers.astype(np.intp), starts.astype(np.intp)


def samples(values: ArrayLike, detected: ArrayLike, worker: ArrayLike) -> Samples:
    """Validate and sort the samples (ModelError on anything unusable)."""
    x = np.asarray(values, dtype=float)
    d = np.asarray(detected, dtype=bool)
    w = np.asarray(worker).astype(str)
    if x.ndim != 1 or x.size == 0 or d.shape != x.shape or w.shape != x.shape:
        raise ModelError(f"values ({x.size}), detected ({d.size}) and worker ({w.size}) must be "
                         "non-empty lists of the same length")
    bad = np.flatnonzero(~np.isfinite(x) | (x <= 0))
    if bad.size:
        raise ModelError(f"values must be positive numbers; {bad.size} are not (first: number "
                         f"{bad[0] + 1}); drop them or give the detection limit of a non-detect")
    labels, code = np.unique(w, return_inverse=True)
    order = np.argsort(code, kind="stable")
    n = np.bincount(code, minlength=labels.size)
    _check_design(labels.size, n, int(d.sum()))
    return build_samples(np.log(x[order]), d[order], code[order], tuple(str(v) for v in labels))


def build_samples(y: FloatArray, d: BoolArray, code: ArrayLike,
                  labels: tuple[str, ...]) -> Samples:
    """:class:`Samples` from log values ``y`` already sorted by worker
    ``code`` (0, 1, ... for ``labels``); no checks of the design."""
    code = np.asarray(code, dtype=np.intp)
    m = len(labels)
    n = np.bincount(code, minlength=m)
    n_det = np.bincount(code[d], minlength=m).astype(float)
    ybar = np.bincount(code[d], weights=y[d], minlength=m) / np.maximum(n_det, 1.0)
    ss = np.bincount(code[d], weights=(y[d] - ybar[code[d]]) ** 2, minlength=m).astype(float)
    cens = np.flatnonzero(~d).astype(np.intp)
    cw, cs = _group(code[cens])
    starts = np.concatenate([[0], np.cumsum(n)[:-1]]).astype(np.intp)
    return Samples(y, d, code, starts, n.astype(np.intp), labels, n_det, ybar, ss, cens, cw, cs)


def _check_design(n_workers: int, n: IntArray, n_detected: int) -> None:
    if n_workers < 2:
        raise ModelError(f"samples from {n_workers} worker: a between-worker variance needs "
                         "samples from at least 2 workers (better 5 or more)")
    if np.all(n == 1):
        raise ModelError("every worker has exactly one sample: variance components need repeated "
                         "samples of at least some workers; add repeats or fit a single "
                         "distribution")
    if n_detected < 3:
        raise ModelError(f"only {n_detected} detected values: at least 3 are needed to fit "
                         "the random-effects model")


# -- the worker integrand ---------------------------------------------------

def log_ndtr_drop(u: FloatArray, h: FloatArray) -> FloatArray:
    r""":math:`\ln\Phi(u) - \ln\Phi(u - h)`. For :math:`|h| < 10^{-3}`,
    :math:`\Phi(u) - \Phi(u - h) = h\,\phi(a)\,[1 + h^2 (a^2 - 1)/24 + O(h^4)]`
    with :math:`a = u - h/2` (Taylor expansion about the midpoint, derived),
    then :math:`-\ln(1 - D/\Phi(u))`, which avoids cancelling two nearly
    equal logarithms."""
    a = u - 0.5 * h
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        ratio = h * np.exp(-0.5 * a * a - _LOG_SQRT_2PI - log_ndtr(u)) * (1.0 + (a * a - 1.0) * h * h / 24.0)
        near = -np.log1p(-ratio)
        far = log_ndtr(u) - log_ndtr(u - h)
    return cast(FloatArray, np.where(np.abs(h) < 1e-3, near, far))


def _col(a: FloatArray, like: FloatArray) -> FloatArray:
    """A per-worker (or per-row) vector shaped to broadcast against ``like``."""
    return a.reshape(a.shape + (1,) * (like.ndim - 1))


@dataclass(frozen=True)
class Integrand:
    r"""The log integrand :math:`g_i(b)` of every worker at ``mu, sb, sw``
    (``sb > 0``), evaluated at ``b`` of shape ``(m,)`` or ``(m, K)``.

    Detected values of worker ``i`` contribute
    :math:`-\frac{SS_i + n_i(\bar y_i - \mu - b)^2}{2\sigma_w^2}
    - n_i \ln(\sqrt{2\pi}\sigma_w)`, a non-detect :math:`\ln\Phi(u)` with
    :math:`u = (\ln L - \mu - b)/\sigma_w`.
    """

    s: Samples
    mu: float
    sb: float
    sw: float

    def _u_cens(self, b: FloatArray) -> FloatArray:
        s = self.s
        rows = b[s.code[s.cens]]
        return (_col(s.y[s.cens], rows) - self.mu - rows) / self.sw

    def _centre(self, b: FloatArray) -> FloatArray:
        """:math:`\\bar y_i - \\mu - b` for the detected values."""
        return _col(self.s.ybar_det, b) - self.mu - b

    def value(self, b: FloatArray) -> FloatArray:
        s = self.s
        nd, ss = _col(s.n_det, b), _col(s.ss_det, b)
        det = (-0.5 * (ss + nd * self._centre(b) ** 2) / self.sw ** 2
               - nd * (np.log(self.sw) + _LOG_SQRT_2PI))
        prior = -0.5 * (b / self.sb) ** 2 - np.log(self.sb) - _LOG_SQRT_2PI
        return cast(FloatArray, det + self.s.cens_sum(log_ndtr(self._u_cens(b))) + prior)

    def drop_and_slope(self, bhat: FloatArray, delta: FloatArray,
                       ln0: FloatArray) -> tuple[FloatArray, FloatArray]:
        r""":math:`g_i(\hat b) - g_i(\hat b + \delta)` (the quadratic terms
        differenced exactly, non-detects by :func:`log_ndtr_drop`, so no
        cancellation for small ``delta``) and :math:`g_i'(\hat b + \delta)`;
        ``ln0`` is :math:`\ln\Phi(u)` of each non-detect at ``bhat``."""
        s = self.s
        b0 = _col(bhat, delta)
        c0 = _col(s.ybar_det, delta) - self.mu - b0
        nd = _col(s.n_det, delta)
        rows = s.code[s.cens]
        u0 = _col((s.y[s.cens] - self.mu - bhat[rows]) / self.sw, delta)
        du = delta[rows] / self.sw
        u = u0 - du
        lnu = log_ndtr(u)
        a = u0 - 0.5 * du
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            ratio = du * np.exp(-0.5 * a * a - _LOG_SQRT_2PI - _col(ln0, du)) * (
                1.0 + (a * a - 1.0) * du * du / 24.0)
            near = -np.log1p(-ratio)
        cens = np.where(np.abs(du) < 1e-3, near, _col(ln0, du) - lnu)
        drop = (0.5 * nd * delta * (delta - 2.0 * c0) / self.sw ** 2 + s.cens_sum(cens)
                + 0.5 * delta * (2.0 * b0 + delta) / self.sb ** 2)
        lam = np.exp(-0.5 * u * u - _LOG_SQRT_2PI - lnu)
        slope = (nd * (c0 - delta) / self.sw ** 2 - s.cens_sum(lam) / self.sw
                 - (b0 + delta) / self.sb ** 2)
        return drop, slope

    def scores(self, b: FloatArray) -> FloatArray:
        r""":math:`\partial g_i(b)/\partial(\mu, \ln\sigma_b, \ln\sigma_w)`
        at ``b`` (shape ``b.shape + (3,)``; derived): detected values give
        :math:`n_i c/\sigma_w^2` and :math:`(SS_i + n_i c^2)/\sigma_w^2 - n_i`
        (:math:`c = \bar y_i - \mu - b`), a non-detect :math:`-\lambda/\sigma_w`
        and :math:`-\lambda u`, the prior :math:`b^2/\sigma_b^2 - 1`."""
        s = self.s
        c, nd, ss = self._centre(b), _col(s.n_det, b), _col(s.ss_det, b)
        u = self._u_cens(b)
        lam = np.exp(-0.5 * u * u - _LOG_SQRT_2PI - log_ndtr(u))
        d_mu = nd * c / self.sw ** 2 - s.cens_sum(lam) / self.sw
        d_sb = (b / self.sb) ** 2 - 1.0
        d_sw = (ss + nd * c * c) / self.sw ** 2 - nd - s.cens_sum(lam * u)
        return np.stack([d_mu, d_sb, d_sw], axis=-1)

    def slopes(self, b: FloatArray) -> tuple[FloatArray, FloatArray]:
        r""":math:`g_i'(b)` and :math:`g_i''(b)`. A non-detect's term
        :math:`\ln\Phi(u)` has derivatives :math:`-\lambda/\sigma_w` and
        :math:`-\lambda(u + \lambda)/\sigma_w^2` in ``b``, with
        :math:`\lambda = \phi(u)/\Phi(u)` (inverse Mills ratio; derived)."""
        u = self._u_cens(b)
        lam = np.exp(-0.5 * u * u - _LOG_SQRT_2PI - log_ndtr(u))
        nd = _col(self.s.n_det, b)
        d1 = nd * self._centre(b) / self.sw ** 2 - self.s.cens_sum(lam) / self.sw - b / self.sb ** 2
        d2 = (-nd / self.sw ** 2 - self.s.cens_sum(np.clip(lam * (u + lam), 0.0, 1.0)) / self.sw ** 2
              - 1.0 / self.sb ** 2)
        return d1, d2


def worker_mode(f: Integrand) -> tuple[FloatArray, FloatArray]:
    """Each worker's mode ``b_hat`` of ``g_i`` (Newton with step halving;
    ``g_i`` is strictly concave) and the Laplace scale ``1/sqrt(-g_i'')``."""
    b = np.zeros(f.s.n_workers)
    for _ in range(200):
        g0 = f.value(b)
        g1, g2 = f.slopes(b)
        step = -g1 / g2
        for _ in range(60):
            worse = f.value(b + step) < g0 - 1e-12 * np.abs(g0)
            if not worse.any():
                break
            step = np.where(worse, 0.5 * step, step)
        b = b + step
        if np.all(np.abs(step) <= 1e-12 * (1.0 + np.abs(b)) + 1e-13 / np.sqrt(-g2)):
            break
    g2 = f.slopes(b)[1]
    return b, 1.0 / np.sqrt(-g2)


def transformed_nodes(f: Integrand, bhat: FloatArray, scale: FloatArray,
                      r: FloatArray) -> tuple[FloatArray, FloatArray]:
    r"""``b(r)`` and ``db/dr`` (each ``(m, K)``) solving
    :math:`g_i(\hat b) - g_i(b) = r^2` on the side ``sign(r)``: Newton on
    :math:`\sqrt{g_i(\hat b) - g_i(b)} = |r|` in :math:`\delta = b - \hat b`
    (linear for a normal integrand), from the normal guess
    :math:`\sqrt 2\,\hat s\,r`, kept on its side. ``r`` must not contain 0."""
    side = np.sign(r)[None, :]
    delta = np.sqrt(2.0) * scale[:, None] * r[None, :]
    s = f.s
    ln0 = log_ndtr((s.y[s.cens] - f.mu - bhat[s.code[s.cens]]) / f.sw)
    for _ in range(100):
        drop, g1 = f.drop_and_slope(bhat, delta, ln0)
        root = np.sqrt(np.maximum(drop, 1e-300))
        step = (root - np.abs(r)[None, :]) * 2.0 * root / -g1
        new = delta - step
        delta = np.where(new * side <= 0, 0.5 * delta, new)
        if np.all(np.abs(step) <= 1e-12 * scale[:, None]):
            break
    g1 = f.drop_and_slope(bhat, delta, ln0)[1]
    return bhat[:, None] + delta, -2.0 * r[None, :] / g1


def graded_rule(order: int = 8, first: float = 1e-5, ratio: float = 3.0,
                width: float = 1.0, end: float = 8.5) -> tuple[FloatArray, FloatArray]:
    r"""Nodes ``r`` and log weights for :math:`\int e^{-r^2} h(r)\,dr`:
    composite Gauss-Legendre of ``order`` on each side of 0, panels growing
    geometrically from ``first`` to 1 and of ``width`` beyond, to ``end``
    (mass beyond is :math:`e^{-72}`). Censoring can make ``h = db/dr``
    change abruptly near ``r = 0`` (the integrand falls steeply on one side
    of its mode and slowly on the other); the graded panels resolve that."""
    edges = [0.0, *np.geomspace(first, 1.0, int(np.ceil(np.log(1.0 / first) / np.log(ratio))) + 1),
             *np.arange(1.0 + width, end, width), end]
    e = np.unique(np.asarray(edges))
    t, w = np.polynomial.legendre.leggauss(order)
    half = 0.5 * np.diff(e)[:, None]
    r = (half * (t + 1.0) + e[:-1, None]).ravel()
    lw = np.log((half * w).ravel())
    nodes = np.concatenate([-r[::-1], r])
    return nodes, np.concatenate([lw[::-1], lw]) - nodes ** 2


_R, _LOG_W = graded_rule()


@dataclass(frozen=True)
class Quadrature:
    """Each worker's quadrature in ``b``: nodes ``b (m, K)``, log weights
    ``logw (m, K)`` (the rule's weight, with ``e^{-r^2}``, times ``db/dr``), and
    :math:`\\ln L_i` (``loglik``, shape ``(m,)``)."""

    b: FloatArray
    logw: FloatArray
    loglik: FloatArray

    def expect(self, h: FloatArray) -> FloatArray:
        """Posterior means of ``h`` (values at the nodes, ``(m, K)`` or
        ``(m, K, p)``)."""
        p = np.exp(self.logw - logsumexp(self.logw, axis=1, keepdims=True))
        return cast(FloatArray, np.sum(p.reshape(p.shape + (1,) * (h.ndim - 2)) * h, axis=1))


def quadrature(s: Samples, mu: float, sb: float, sw: float,
               r: FloatArray = _R, log_w: FloatArray = _LOG_W) -> Quadrature:
    """The worker integrals by the rule ``r, log_w`` in ``r`` (module
    docstring; :func:`graded_rule` by default)."""
    f = Integrand(s, mu, sb, sw)
    bhat, scale = worker_mode(f)
    ghat = f.value(bhat)
    b, db = transformed_nodes(f, bhat, scale, r)
    logw = log_w[None, :] + np.log(db)
    return Quadrature(b, logw, ghat + logsumexp(logw, axis=1))


# -- the likelihood ---------------------------------------------------------

def closed_form_loglik(s: Samples, mu: float, sb: float, sw: float) -> float:
    r"""Log-likelihood of fully detected samples: per worker,
    :math:`-\frac{n}{2}\ln 2\pi - (n-1)\ln\sigma_w - \frac12\ln\tau
    - \frac{SS_w}{2\sigma_w^2} - \frac{n(\bar y - \mu)^2}{2\tau}`,
    :math:`\tau = \sigma_w^2 + n\sigma_b^2` (derived from the normal
    marginal; valid at ``sb = 0``)."""
    n = s.n.astype(float)
    ybar = s.worker_sum(s.y) / n
    ssw = s.worker_sum((s.y - s.per_row(ybar)) ** 2)
    tau = sw * sw + n * sb * sb
    terms = (-n * _LOG_SQRT_2PI - (n - 1) * np.log(sw) - 0.5 * np.log(tau)
             - 0.5 * ssw / (sw * sw) - 0.5 * n * (ybar - mu) ** 2 / tau)
    return float(np.sum(terms))


def boundary_loglik(s: Samples, mu: float, sw: float) -> float:
    """Log-likelihood at ``sb = 0``: independent left-censored normal values."""
    u = (s.y - mu) / sw
    with np.errstate(divide="ignore"):
        terms = np.where(s.detected, -0.5 * u * u - np.log(sw) - _LOG_SQRT_2PI, log_ndtr(u))
    return float(np.sum(terms))


def closed_form_gradient(s: Samples, mu: float, sb: float, sw: float) -> FloatArray:
    r"""Gradient of :func:`closed_form_loglik` in ``(mu, ln sb, ln sw)``
    (derived): :math:`\sum n(\bar y - \mu)/\tau`, :math:`\sum 2 n\sigma_b^2 D`
    and :math:`\sum [SS_w/\sigma_w^2 - (n - 1) + 2\sigma_w^2 D]`, with
    :math:`D = -1/(2\tau) + n(\bar y - \mu)^2/(2\tau^2)`."""
    n = s.n.astype(float)
    ybar = s.worker_sum(s.y) / n
    ssw = s.worker_sum((s.y - s.per_row(ybar)) ** 2)
    tau = sw * sw + n * sb * sb
    e = ybar - mu
    dtau = -0.5 / tau + 0.5 * n * e * e / tau ** 2
    return np.array([np.sum(n * e / tau), np.sum(2.0 * n * sb * sb * dtau),
                     np.sum(ssw / (sw * sw) - (n - 1) + 2.0 * sw * sw * dtau)])


def loglik_and_gradient(s: Samples, theta: FloatArray) -> tuple[float, FloatArray]:
    r"""The log-likelihood at internal ``theta = (mu, ln sb, ln sw)`` and
    its gradient; for censored data the gradient is
    :math:`\sum_i E[\partial g_i/\partial\theta \mid y_i]` over the
    quadrature (the derivative of :math:`\ln \int e^{g_i}`)."""
    mu, sb, sw = float(theta[0]), float(np.exp(theta[1])), float(np.exp(theta[2]))
    if s.detected.all():
        return closed_form_loglik(s, mu, sb, sw), closed_form_gradient(s, mu, sb, sw)
    q = quadrature(s, mu, sb, sw)
    grad = q.expect(Integrand(s, mu, sb, sw).scores(q.b)).sum(axis=0)
    return float(np.sum(q.loglik)), cast(FloatArray, grad)


def loglik(s: Samples, mu: float, sb: float, sw: float) -> float:
    """The model's log-likelihood (closed form when nothing is censored,
    the quadrature otherwise, the independent model at ``sb = 0``)."""
    if s.detected.all():
        return closed_form_loglik(s, mu, sb, sw)
    if sb == 0:
        return boundary_loglik(s, mu, sw)
    return float(np.sum(quadrature(s, mu, sb, sw).loglik))


# -- fitting --------------------------------------------------------------

def start(s: Samples) -> FloatArray:
    """Starting ``(mu, ln sb, ln sw)``: one-way ANOVA moment estimates
    (Searle, Casella & McCulloch 1992, Variance Components, from memory)
    with non-detects at ``L / sqrt 2`` (a start only), ``sb`` kept at least
    ``0.3 sw`` to start away from the boundary."""
    y = np.where(s.detected, s.y, s.y - 0.5 * np.log(2.0))
    n = s.n.astype(float)
    big_n, m = float(n.sum()), float(n.size)
    ybar = s.worker_sum(y) / n
    grand = float(np.mean(y))
    msw = float(np.sum((y - s.per_row(ybar)) ** 2)) / (big_n - m)
    msb = float(np.sum(n * (ybar - grand) ** 2)) / (m - 1)
    n0 = (big_n - float(np.sum(n * n)) / big_n) / (m - 1)
    vw = max(msw, 1e-6 * float(np.var(y)) + 1e-12)
    vb = max((msb - msw) / n0, 0.09 * vw)
    return np.array([grand, 0.5 * np.log(vb), 0.5 * np.log(vw)])


def _negative(s: Samples) -> Callable[[FloatArray], tuple[float, FloatArray]]:
    def neg(theta: FloatArray) -> tuple[float, FloatArray]:
        with np.errstate(all="ignore"):
            value, grad = loglik_and_gradient(s, np.asarray(theta, dtype=float))
        if not (np.isfinite(value) and np.all(np.isfinite(grad))):
            return np.inf, np.zeros(3)
        return -value, -grad
    return neg


def _stationary(s: Samples, theta: FloatArray) -> bool:
    value, grad = _negative(s)(theta)
    return bool(np.isfinite(value) and np.max(np.abs(grad)) < 1e-5 * max(1.0, abs(value)))


def hessian(s: Samples, theta: FloatArray, step: float = 1e-4) -> FloatArray:
    """Hessian of the log-likelihood in ``theta`` by central differences
    of the analytic gradient, symmetrised."""
    cols = []
    for j in range(theta.size):
        e = np.zeros(theta.size)
        e[j] = step
        cols.append((loglik_and_gradient(s, theta + e)[1]
                     - loglik_and_gradient(s, theta - e)[1]) / (2.0 * step))
    h = np.column_stack(cols)
    return cast(FloatArray, 0.5 * (h + h.T))


def _covariance(s: Samples, theta: FloatArray) -> tuple[FloatArray | None, tuple[str, ...]]:
    info = -hessian(s, theta)
    if np.all(np.isfinite(info)) and np.all(np.linalg.eigvalsh(info) > 0):
        return cast(FloatArray, np.linalg.inv(info)), ()
    return None, (NOT_POSITIVE,)


def _interior(s: Samples) -> Maximum | None:
    """BFGS with the analytic gradient, then a Nelder-Mead restart if it
    stops away from a stationary point; ``None`` if both do."""
    neg = _negative(s)
    with np.errstate(invalid="ignore", over="ignore"):
        res = minimize(neg, start(s), jac=True, method="BFGS", options={"gtol": 1e-8})
        if not _stationary(s, res.x):
            simplex = minimize(lambda th: neg(th)[0], res.x, method="Nelder-Mead",
                               options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 4000})
            res = minimize(neg, simplex.x, jac=True, method="BFGS", options={"gtol": 1e-8})
    theta = np.asarray(res.x, dtype=float)
    if not _stationary(s, theta):
        return None
    cov, warnings = _covariance(s, theta)
    return Maximum(theta, -neg(theta)[0], cov, warnings)


def _boundary(s: Samples) -> Maximum:
    def ll(theta: FloatArray) -> float:
        return boundary_loglik(s, float(theta[0]), float(np.exp(theta[1])))
    s0 = start(s)
    return maximise(ll, np.array([s0[0], 0.5 * np.log(np.exp(2 * s0[1]) + np.exp(2 * s0[2]))]),
                    what="random-effects fit at sb = 0")


def _boundary_is_maximum(s: Samples, edge: Maximum) -> bool:
    """Whether the log-likelihood falls as ``sb^2`` leaves 0 (one-sided
    difference in ``sb^2`` at the boundary fit)."""
    mu, sw = float(edge.theta[0]), float(np.exp(edge.theta[1]))
    h = 1e-6 * sw * sw
    return loglik(s, mu, float(np.sqrt(h)), sw) <= edge.loglik + 1e-9 * max(1.0, abs(edge.loglik))


def fit_workers(values: ArrayLike, detected: ArrayLike, worker: ArrayLike) -> WorkerModel:
    """Fit the one-way random-effects model by maximum likelihood.

    Parameters
    ----------
    values
        Positive sample results; for a non-detect, its detection limit.
    detected
        False where the value is a detection limit (left-censored).
    worker
        Each sample's worker identifier (compared as text).

    Returns
    -------
    WorkerModel
        Estimates, covariance, per-worker posterior summaries and notes.
        A between-worker SD below ``BOUNDARY_RATIO`` x the within-worker SD
        is reported as 0 with a note (no covariance there).
    """
    s = samples(values, detected, worker)
    best = _interior(s)
    if best is not None and np.exp(best.theta[1]) >= BOUNDARY_RATIO * np.exp(best.theta[2]):
        mu, sb, sw = float(best.theta[0]), float(np.exp(best.theta[1])), float(np.exp(best.theta[2]))
        return _model(s, mu, sb, sw, best.loglik, best.cov, best.warnings)
    edge = _boundary(s)
    if best is None and not _boundary_is_maximum(s, edge):
        raise FitError("random-effects fit: the maximum-likelihood search did not converge; "
                       "check the data for outliers and worker identifiers")
    note = ("the between-worker SD is estimated at 0 (the boundary of the parameter space, "
            f"below {BOUNDARY_RATIO:g} x the within-worker SD): the data show no difference "
            "between workers' long-term means beyond day-to-day variation; there is no "
            "covariance at the boundary")
    return _model(s, float(edge.theta[0]), 0.0, float(np.exp(edge.theta[1])), edge.loglik,
                  None, (note,))


def _model(s: Samples, mu: float, sb: float, sw: float, ll: float, cov: FloatArray | None,
           warnings: tuple[str, ...]) -> WorkerModel:
    n_cens = int(np.sum(~s.detected))
    method = METHOD + (
        "; non-detects left-censored, each worker's integral over its effect by quadrature "
        "after the change of variable g(b_hat) - g(b) = r^2" if n_cens else
        "; closed-form normal marginal likelihood")
    return WorkerModel(mu=mu, sigma_within=sw, sigma_between=sb, loglik=ll, cov=cov,
                       n_samples=int(s.y.size), n_workers=s.n_workers, n_censored=n_cens,
                       method=method, notes=warnings + _notes(s, n_cens),
                       workers=worker_estimates(s, mu, sb, sw), at_boundary=sb == 0)


def _notes(s: Samples, n_cens: int) -> tuple[str, ...]:
    out = [EMPIRICAL_BAYES_NOTE]
    if s.n_workers < 5:
        out.append(f"only {s.n_workers} workers: the between-worker SD is poorly determined")
    if 2 * n_cens > s.y.size:
        out.append(f"{n_cens} of {s.y.size} values are non-detects: the estimates rest largely "
                   "on the assumed lognormal shape")
    all_nd = int(np.sum(s.worker_sum((~s.detected).astype(float)) == s.n))
    if all_nd:
        out.append(f"{all_nd} workers have only non-detects: their summaries rest on the model")
    return tuple(out)


# -- per-worker summaries ---------------------------------------------------

#: Fine grid in ``r`` for posterior quantiles (mass beyond |r| = 8 is
#: e^-64), graded towards 0 like :func:`graded_rule`.
_NEAR_0 = np.geomspace(1e-5, 0.01, 30)
_FINE_R = np.unique(np.concatenate([-_NEAR_0, _NEAR_0, np.linspace(-8.0, 8.0, 2000)]))


def worker_estimates(s: Samples, mu: float, sb: float, sw: float,
                     level: float = 0.95) -> tuple[WorkerEstimate, ...]:
    """Posterior summaries of every worker (:class:`WorkerEstimate`)."""
    if sb == 0:
        mean = np.zeros(s.n_workers)
        sd = np.zeros(s.n_workers)
        ltm = np.zeros(s.n_workers)
        lo, hi = mean, mean
    else:
        q = quadrature(s, mu, sb, sw)
        mean = q.expect(q.b)
        sd = np.sqrt(np.maximum(q.expect((q.b - mean[:, None]) ** 2), 0.0))
        ltm = logsumexp(q.logw + q.b, axis=1) - logsumexp(q.logw, axis=1)
        lo, hi = _posterior_quantiles(s, mu, sb, sw, level)
    shift = mu + 0.5 * sw * sw
    n_cens = s.worker_sum((~s.detected).astype(float))
    return tuple(
        WorkerEstimate(worker=s.labels[i], n=int(s.n[i]), n_censored=int(n_cens[i]),
                       mean_log=float(mu + mean[i]), sd_log=float(sd[i]),
                       long_term_mean=float(np.exp(shift + ltm[i])),
                       lower=float(np.exp(shift + lo[i])), upper=float(np.exp(shift + hi[i])),
                       level=level)
        for i in range(s.n_workers))


def _posterior_quantiles(s: Samples, mu: float, sb: float, sw: float,
                         level: float) -> tuple[FloatArray, FloatArray]:
    r"""Equal-tailed posterior quantiles of ``b_i``. The posterior CDF in
    ``r`` is :math:`\int_{-\infty}^{r} e^{-t^2} b'(t)\,dt` (normalised):
    ``b'`` linear between fine-grid points, :math:`e^{-t^2}` integrated
    exactly; the probit of the CDF and ``b(r)`` are then interpolated
    linearly, which is exact for a normal posterior."""
    f = Integrand(s, mu, sb, sw)
    bhat, scale = worker_mode(f)
    r = _FINE_R
    b, db = transformed_nodes(f, bhat, scale, r)
    t0, t1 = r[:-1], r[1:]
    mass = np.sqrt(np.pi) * ndtr_between(np.sqrt(2.0) * t0, np.sqrt(2.0) * t1)
    first = 0.5 * (np.exp(-t0 * t0) - np.exp(-t1 * t1)) - t0 * mass
    slope = np.diff(db, axis=1) / np.diff(r)
    cdf = np.concatenate([np.zeros((b.shape[0], 1)),
                          np.cumsum(db[:, :-1] * mass + slope * first, axis=1)], axis=1)
    cdf /= cdf[:, -1:]
    tail = 0.5 * (1.0 - level)
    out = []
    for p in (tail, 1.0 - tail):
        q = np.empty(b.shape[0])
        for i in range(b.shape[0]):
            inside = (cdf[i] > 1e-12) & (cdf[i] < 1.0 - 1e-12)
            rq = np.interp(ndtri(p), ndtri(cdf[i, inside]), r[inside])
            q[i] = np.interp(rq, r, b[i])
        out.append(q)
    return out[0], out[1]


# -- uses of the fit --------------------------------------------------------

def _check_limit(limit: float) -> float:
    if not (np.isfinite(limit) and limit > 0):
        raise ModelError(f"the limit must be a positive number, got {limit!r}")
    return float(limit)


def exceedance_of_worker_means(model: WorkerModel, limit: float, *,
                               level: float = 0.95) -> tuple[float, float, float]:
    r"""Probability that a randomly chosen worker's long-term arithmetic
    mean exceeds ``limit``, with a delta-method interval on the probit
    scale: ``(estimate, lower, upper)``.

    :math:`P = \Phi(z)`, :math:`z = (\mu + \sigma_w^2/2 - \ln L)/\sigma_b`
    (Rappaport & Kupper 2008, from memory; the long-term mean is lognormal
    over workers). On ``(mu, ln sb, ln sw)``,
    :math:`\nabla z = (1/\sigma_b, -z, \sigma_w^2/\sigma_b)` (derived); the
    interval is :math:`\Phi(z \pm z_{1-\alpha/2}\,se(z))`.

    The figure describes the sampled group under the model; a compliance
    decision rests with local regulations and a qualified hygienist.
    """
    lim = _check_limit(limit)
    if not 0 < level < 1:
        raise ModelError(f"level must lie between 0 and 1, got {level!r}")
    if model.sigma_between == 0 or model.cov is None:
        raise ModelError("the fit has no between-worker SD or no covariance (see its notes): the "
                         "exceedance of worker means has no interval; collect more workers "
                         "or repeats")
    sb, sw = model.sigma_between, model.sigma_within
    z = (model.mu + 0.5 * sw * sw - np.log(lim)) / sb
    grad = np.array([1.0 / sb, -z, sw * sw / sb])
    se = float(np.sqrt(grad @ model.cov @ grad))
    half = float(ndtri(0.5 + 0.5 * level)) * se
    return float(ndtr(z)), float(ndtr(z - half)), float(ndtr(z + half))


def workers_above(model: WorkerModel, limit: float) -> tuple[WorkerEstimate, ...]:
    """Workers whose estimated long-term mean (posterior mean,
    :class:`WorkerEstimate`) is above ``limit``, largest first.

    An estimate is not a measurement: read each worker's interval too. A
    worker not listed is not thereby shown to comply; compliance is for
    local regulations and a qualified hygienist to judge."""
    lim = _check_limit(limit)
    above = [w for w in model.workers if w.long_term_mean > lim]
    return tuple(sorted(above, key=lambda w: w.long_term_mean, reverse=True))


def long_term_exposure(model: WorkerModel) -> Exposure:
    r"""The distribution of workers' long-term mean exposure, lognormal with
    ``gm = exp(mu + sw^2/2)`` and ``gsd = exp(sb)``.

    Its ``fit.cov_internal`` (on the lognormal's internal
    ``(ln gm, ln ln gsd) = (mu + sw^2/2, ln sb)``) is :math:`J C J^T` with
    :math:`J = [[1, 0, \sigma_w^2], [0, 1, 0]]` on ``(mu, ln sb, ln sw)``
    (delta method, derived), so Monte Carlo draws carry the fit's
    uncertainty.
    """
    if model.sigma_between == 0:
        raise ModelError("the between-worker SD is estimated at 0: every worker has the same "
                         "long-term mean under the model, which no lognormal describes; give "
                         "that mean as a fixed exposure or collect more workers")
    fam = LogNormal()
    sw = model.sigma_within
    params = np.array([np.exp(model.mu + 0.5 * sw * sw), np.exp(model.sigma_between)])
    check_usable(fam, params)
    cov = None
    if model.cov is not None:
        jac = np.array([[1.0, 0.0, sw * sw], [0.0, 1.0, 0.0]])
        cov = jac @ model.cov @ jac.T
    fit = ExposureFit(method=model.method + "; long-term means of workers", loglik=model.loglik,
                      n=model.n_samples, detected=model.n_samples - model.n_censored,
                      censored=model.n_censored, cov_internal=cov,
                      warnings=tuple(n for n in model.notes if n != EMPIRICAL_BAYES_NOTE))
    return Exposure(family=fam, params=params, fit=fit, source="measurements",
                    notes=(LONG_TERM_NOTE,))
