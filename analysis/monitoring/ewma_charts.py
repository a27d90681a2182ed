"""EWMA of one series and the multivariate EWMA (MEWMA) of the scores, with their limits.

References
----------
Roberts, S.W. (1959) Control chart tests based on geometric moving averages.
    Technometrics 1(3), 239-250.
Lucas, J.M., Saccucci, M.S. (1990) Exponentially weighted moving average
    control schemes: properties and enhancements. Technometrics 32(1), 1-12.
Lowry, C.A., Woodall, W.H., Champ, C.W., Rigdon, S.E. (1992) A multivariate
    exponentially weighted moving average control chart. Technometrics
    34(1), 46-53.
Tracy, N.D., Young, J.C., Mason, R.L. (1992) Multivariate control charts for
    individual observations. Journal of Quality Technology 24(2), 88-95.
Montgomery, D.C. Introduction to Statistical Quality Control (chapters on
    EWMA and multivariate charts).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import signal, stats

from analysis.errors import InputError
from analysis.monitoring.run_rules import _check_count, _series
from analysis.monitoring.scoring import _check_fitted
from analysis.pca import PCAModel

MEWMA_RUNS = 2000  # simulated in-control runs for the MEWMA limit
MEWMA_HORIZON = 10  # each run is followed for this many multiples of the target ARL
MEWMA_BLOCK = 64  # time steps simulated at once


def check_lambda(lam) -> float:
    """The EWMA weight as float; InputError unless 0 < lambda <= 1."""
    try:
        value = float(lam)
    except (TypeError, ValueError) as exc:
        raise InputError(f"lambda={lam!r} is not a number") from exc
    if not 0.0 < value <= 1.0:
        raise InputError(f"lambda={lam!r} must lie in (0, 1] (e.g. 0.2)")
    return value


def _positive(name: str, value) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name}={value!r} is not a number") from exc
    if not (math.isfinite(number) and number > 0):
        raise InputError(f"{name}={value!r} must be a positive number")
    return number


def _ewma_filter(x: np.ndarray, lam: float, zi=None):
    """z_i = lam x_i + (1-lam) z_{i-1} along axis 0, z_0 = 0 (or the filter state ``zi``)."""
    if zi is None:
        return signal.lfilter([lam], [1.0, lam - 1.0], x, axis=0)
    return signal.lfilter([lam], [1.0, lam - 1.0], x, axis=0, zi=zi)


def _variance_factor(lam: float, steps: np.ndarray) -> np.ndarray:
    """lam/(2-lam) [1 - (1-lam)^(2i)] for i in ``steps`` (1-based)."""
    with np.errstate(divide="ignore"):
        decay = np.expm1(2.0 * steps * np.log1p(-lam))  # (1-lam)^(2i) - 1, exact for small lam
    return lam / (2.0 - lam) * -decay


@dataclass(frozen=True, eq=False)
class EwmaChart:
    """EWMA statistic (m,) with its limits per point (exact variance)."""

    statistic: np.ndarray
    centre: float
    upper: np.ndarray
    lower: np.ndarray
    lam: float
    width: float

    @property
    def exceeds(self) -> np.ndarray:
        return (self.statistic > self.upper) | (self.statistic < self.lower)


def ewma(values, lam: float = 0.2, *, target: float = 0.0, sigma: float = 1.0, width: float = 3.0) -> EwmaChart:
    """EWMA chart of one series (a score, or T² with ``new_sample_t2_moments``).

    z_i = lam x_i + (1-lam) z_{i-1}, z_0 = target (Roberts 1959, Technometrics
    1(3), 239-250); limits target +- width sigma sqrt(lam/(2-lam) [1-(1-lam)^(2i)])
    with the exact variance of z_i (Lucas & Saccucci 1990, Technometrics
    32(1), 1-12; Montgomery, EWMA section). Defaults lam = 0.2, width = 3:
    common practice. For T², whose distribution is skewed, the normal-theory
    limits are an approximation (common practice).
    """
    x = _series(values, "EWMA values")
    lam = check_lambda(lam)
    sigma, width = _positive("sigma", sigma), _positive("width", width)
    target = float(_series([target], "EWMA target")[0])
    statistic = _ewma_filter(x - target, lam) + target
    half = width * sigma * np.sqrt(_variance_factor(lam, np.arange(1, x.size + 1)))
    return EwmaChart(statistic, target, target + half, target - half, lam, width)


def new_sample_t2_moments(model: PCAModel) -> tuple[float, float]:
    """Mean and SD of the new-sample T² distribution, c F(A, n-A), c = A(n+1)(n-1)/(n(n-A)).

    Tracy, Young & Mason (1992); the F moments from scipy. The centre and
    sigma of an EWMA of T². Needs n - A > 4 (the F variance exists).
    """
    _check_fitted(model)
    n, a = int(model.n_samples_), int(model.n_components_)
    if n - a <= 4:
        raise InputError(f"the T² EWMA needs more than A+4 training samples (n={n}, A={a})")
    scale = a * (n + 1) * (n - 1) / (n * (n - a))
    mean, variance = stats.f.stats(a, n - a, moments="mv")
    return float(scale * mean), float(scale * math.sqrt(variance))


@dataclass(frozen=True, eq=False)
class MewmaChart:
    """MEWMA statistic (m,), its limit h4 and the weight lambda."""

    statistic: np.ndarray
    limit: float
    lam: float

    @property
    def exceeds(self) -> np.ndarray:
        return self.statistic > self.limit


def mewma(scores, variances, lam: float = 0.1, *, limit: float | None = None, arl0: float = 200.0,
          seed: int = 0) -> MewmaChart:
    """Multivariate EWMA of the scores (Lowry, Woodall, Champ & Rigdon 1992).

    z_i = lam x_i + (1-lam) z_{i-1}, z_0 = 0, and T²_i = z_i' Sigma_z,i^-1 z_i
    with the exact covariance Sigma_z,i = lam/(2-lam) [1-(1-lam)^(2i)] Sigma.
    ``variances`` (q,) is the diagonal of Sigma: the model's eigenvalues for
    its scores, whose training covariance is diagonal. ``limit`` (h4) defaults
    to ``mewma_limit(q, lam, arl0, seed=seed)``, a seeded simulation; the
    default lam = 0.1 is common practice.
    """
    try:
        x = np.asarray(scores, dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise InputError(f"MEWMA scores must be numbers: {exc}") from exc
    if x.ndim != 2 or x.shape[0] == 0:
        raise InputError(f"MEWMA scores must be a table of samples x components, got shape {x.shape}")
    if not np.isfinite(x).all():
        i, j = np.argwhere(~np.isfinite(x))[0]
        raise InputError(f"MEWMA scores: value {x[i, j]!r} at sample position {i}, component {j + 1} is not finite")
    sigma = np.asarray(variances, dtype=np.float64).ravel()
    if sigma.size != x.shape[1] or not (np.isfinite(sigma).all() and (sigma > 0).all()):
        raise InputError(f"MEWMA needs {x.shape[1]} positive, finite variances, got {sigma.tolist()}")
    lam = check_lambda(lam)
    limit = mewma_limit(x.shape[1], lam, arl0, seed=seed) if limit is None else _positive("limit", limit)
    z = _ewma_filter(x, lam)
    statistic = np.einsum("ia,ia->i", z, z / sigma) / _variance_factor(lam, np.arange(1, x.shape[0] + 1))
    return MewmaChart(statistic, limit, lam)


def mewma_limit(n_variables: int, lam: float = 0.1, arl0: float = 200.0, *, n_runs: int = MEWMA_RUNS,
                seed: int = 0) -> float:
    """MEWMA limit h4 giving an in-control average run length ``arl0``, by seeded simulation.

    With known in-control parameters the run length of the MEWMA depends only
    on the number of variables q and lam (Lowry et al. 1992), so standard
    normal vectors are simulated: ``n_runs`` runs of the statistic of
    ``mewma`` (exact covariance), each followed for 10 arl0 steps (a run that
    has not signalled by then counts as 10 arl0 + 1). h4 is the smallest
    running maximum at which the mean run length reaches ``arl0``. The
    simulation error of the ARL is about arl0 / sqrt(n_runs) (2 % with the
    default 2000 runs). Takes about 0.1 s per million simulated q-vectors.
    Estimated parameters raise the false-alarm rate; not corrected here.
    """
    _check_count("n_variables", n_variables, 1)
    _check_count("n_runs", n_runs, 100)
    lam = check_lambda(lam)
    arl0 = _positive("arl0", arl0)
    if arl0 <= 1:
        raise InputError(f"arl0={arl0!r} must exceed 1")
    q, runs = int(n_variables), int(n_runs)
    horizon = int(math.ceil(MEWMA_HORIZON * arl0))
    rng = np.random.default_rng(seed)
    state = np.zeros((1, runs, q))
    peak = np.full(runs, -np.inf)
    times, chains, heights = [], [], []
    for start in range(0, horizon, MEWMA_BLOCK):
        steps = min(MEWMA_BLOCK, horizon - start)
        z, state = _ewma_filter(rng.standard_normal((steps, runs, q)), lam, zi=state)
        t2 = np.einsum("tcq,tcq->tc", z, z) / _variance_factor(lam, np.arange(start + 1, start + steps + 1))[:, None]
        peaks = np.maximum.accumulate(np.vstack([peak, t2]), axis=0)
        t, c = np.nonzero(peaks[1:] > peaks[:-1])  # a new running maximum (a record) per run
        times.append(start + 1 + t)
        chains.append(c)
        heights.append(peaks[1:][t, c])
        peak = peaks[-1]
    times, chains, heights = (np.concatenate(v) for v in (times, chains, heights))

    def mean_run_length(h: float) -> float:
        length = np.full(runs, horizon + 1.0)
        over = heights > h
        np.minimum.at(length, chains[over], times[over].astype(np.float64))
        return float(length.mean())

    candidates = np.unique(heights)
    low, high = 0, candidates.size - 1  # every run is censored at the highest record
    while low < high:
        middle = (low + high) // 2
        if mean_run_length(candidates[middle]) >= arl0:
            high = middle
        else:
            low = middle + 1
    return float(candidates[low])
