"""Robust PCA (ROBPCA) with score and orthogonal distances, and the FastMCD fit it builds on.

``RobustPCAModel`` follows the three stages of ROBPCA (Hubert, Rousseeuw &
Vanden Branden 2005) as the authors' MATLAB library LIBRA implements them:

1. the preprocessed data are reduced to their affine subspace by an SVD of
   the mean-centred data (r0 = rank <= min(n - 1, p) coordinates); this is how
   the method handles more variables than samples (p > n);
2. every sample gets an outlyingness, the largest standardised distance from
   the univariate MCD location over directions through pairs of samples
   (Stahel 1981, Donoho 1982 type; all pairs up to 250, else 250 random
   pairs); the h = max([alpha n], [(n + k + 1) / 2]) least outlying samples
   (H0) give a classical PCA and a k-dimensional plane;
3. the samples whose orthogonal distance to that plane lies within its
   cut-off (H1) give a second classical PCA; all samples projected onto its
   k leading eigenvectors get a reweighted MCD location and scatter (FastMCD,
   Rousseeuw & Van Driessen 1999, through scikit-learn's ``MinCovDet``, also
   started from the H1 estimate); its eigenvectors, turned back into the
   variable space, are the robust loadings, its eigenvalues the robust
   eigenvalues.

Each sample is then described by its score distance (SD, robust Mahalanobis
distance in the score space; cut-off sqrt(chi2_{k, 0.975})) and orthogonal
distance (OD, distance to the robust model plane; cut-off (t + s z_0.975)^(3/2)
with t, s the univariate MCD of OD^(2/3), by the Wilson-Hilferty
approximation), which together sort the samples into four regions.

``fit_mcd`` is the one place where scikit-learn is used (``MinCovDet`` only,
for its raw estimate). For more than ``max_samples`` rows it fits
``MinCovDet`` to a seeded random subsample and then runs concentration steps
(C-steps) on all rows: the nested design of FastMCD itself, whose
scikit-learn version gets slow for large n. Consistency correction and
reweighting are done here, so results do not depend on the scikit-learn
version. Above ``projection_max_samples`` rows the univariate MCD of each
projection direction is taken from a seeded subsample (every row still gets
its outlyingness): a speed-up that is ours, not the paper's.

References
----------
Hubert, M., Rousseeuw, P.J., Vanden Branden, K. (2005) ROBPCA: a new approach
    to robust principal component analysis. Technometrics 47(1), 64-79.
Rousseeuw, P.J., Van Driessen, K. (1999) A fast algorithm for the minimum
    covariance determinant estimator. Technometrics 41(3), 212-223.
Croux, C., Haesbroeck, G. (1999) Influence function and efficiency of the
    minimum covariance determinant scatter matrix estimator. Journal of
    Multivariate Analysis 71, 161-190 (consistency factor).
Verboven, S., Hubert, M. (2005) LIBRA: a MATLAB library for robust
    analysis. Chemometrics and Intelligent Laboratory Systems 75, 127-136.
Pison, G., Van Aelst, S., Willems, G. (2002) Small sample corrections for LTS
    and MCD. Metrika 55, 111-123 (the factor in the form used here).
Rousseeuw, P.J., Leroy, A.M. (1987) Robust Regression and Outlier Detection.
    Wiley (univariate MCD by the shortest-variance window of sorted data).
Wilson, E.B., Hilferty, M.M. (1931) The distribution of chi-square.
    Proceedings of the National Academy of Sciences 17, 684-688.
"""

from __future__ import annotations

import functools
import warnings
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats
from sklearn.covariance import MinCovDet

from analysis import diagnostics
from analysis.errors import InputError
from analysis.pca import _scores_and_spe_blocks, _sign_convention, numerical_rank
from analysis.preprocessing import (
    SCALINGS,
    Preprocessor,
    apply_log10,
    check_log10,
    default_sample_ids,
    scale_block,
    validated,
)

SCALE_ESTIMATORS = ("mad", "sd")
REGIONS = ("regular", "far along the model", "off the model plane", "far and off")
N_DIRECTIONS = 250  # Hubert et al. (2005): 250 directions through pairs of samples, or all pairs
MCD_MAX_SAMPLES = 500  # scikit-learn's FastMCD runs one stage up to 500 rows, nested (slowly) above
PROJECTION_MAX_SAMPLES = 5000  # rows whose projections give the univariate MCD of each direction
REWEIGHT_LEVEL = 0.975  # Rousseeuw & Van Driessen (1999): weight 0 beyond the 97.5% chi-square quantile
C_STEP_MAX_ITER = 30  # as scikit-learn's FastMCD
C_STEP_TOL = 1e-5  # relative change of log det below which C-steps stop (np.allclose, as scikit-learn)
BLOCK_ROWS = 2048  # rows per block of the outlyingness pass (2048 x 250 doubles = 4 MB)


# ------------------------------------------------------------------------ MCD
@dataclass
class McdFit:
    """A reweighted MCD fit of m rows in q dimensions.

    location (q,), covariance (q, q): reweighted estimates (consistency-corrected);
    raw_location (q,), raw_covariance (q, q): of the h-subset (uncorrected, divisor h);
    raw_support, support: bool (m,), the h-subset and the rows kept by the reweighting;
    distances: (m,) squared robust Mahalanobis distances under the reweighted estimates;
    warnings: messages the estimator raised.
    """

    location: np.ndarray
    covariance: np.ndarray
    raw_location: np.ndarray
    raw_covariance: np.ndarray
    raw_support: np.ndarray
    support: np.ndarray
    distances: np.ndarray
    warnings: list[str] = field(default_factory=list)


def consistency_factor(q: int, fraction: float) -> float:
    """Factor making the covariance of the central ``fraction`` of N(0, S) consistent for S.

    c = fraction / F_{chi2, q+2}(chi2_{q, fraction}) (Croux & Haesbroeck 1999).
    """
    return float(fraction / stats.chi2.cdf(stats.chi2.ppf(fraction, q), q + 2))


def fraction_for(h: int, n: int) -> float:
    """A ``support_fraction`` for which scikit-learn's ``int(fraction * n)`` is exactly h (h/n can round below)."""
    fraction = h / n
    while int(fraction * n) < h:
        fraction = float(np.nextafter(fraction, 2.0))
    return fraction


def fit_mcd(Y, h: int, random_state: int = 0, max_samples: int = MCD_MAX_SAMPLES, starts=()) -> McdFit:
    """Reweighted MCD of the rows of Y (m, q) with h-subsets, by FastMCD (Rousseeuw & Van Driessen 1999).

    Raw estimate: up to ``max_samples`` rows, scikit-learn ``MinCovDet(random_state)``
    with exactly h rows in its subsets; above, ``MinCovDet`` on a seeded subsample
    of ``max_samples`` rows refined by C-steps on all rows (the nested design of
    FastMCD; scikit-learn's own takes about 20 s for 100,000 x 5). Each
    ``(location, covariance)`` in ``starts`` is refined by C-steps as well, and
    the candidate with the smallest covariance determinant is kept (as the
    authors' ROBPCA implementation does with its stage-2 estimate).
    Correction and reweighting then follow ``_reweight`` (identical to
    ``MinCovDet`` from scikit-learn 1.8 on, whatever version is installed).
    """
    Y = np.asarray(Y, dtype=np.float64)
    m, q = Y.shape
    if h <= q:
        raise InputError(f"the MCD needs more than {q} rows in its subset, got h={h} of {m} rows")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            rows = np.arange(m)
            if m > max_samples:
                rows = np.sort(np.random.default_rng(random_state).choice(m, size=max_samples, replace=False))
            mcd = MinCovDet(support_fraction=fraction_for(h, m) if m <= max_samples else h / m,
                            random_state=random_state).fit(Y[rows])
        except ValueError as exc:  # MinCovDet refuses a subset whose covariance is 0
            raise InputError(f"the MCD cannot be computed: {exc}") from exc
    candidates = []
    if m <= max_samples:
        sign, logdet = np.linalg.slogdet(mcd.raw_covariance_)
        candidates.append((logdet if sign > 0 else -np.inf, mcd.raw_location_, mcd.raw_covariance_, mcd.raw_support_))
    else:
        candidates.append(_c_steps(Y, h, mcd.raw_location_, mcd.raw_covariance_))
    candidates.extend(_c_steps(Y, h, location, covariance) for location, covariance in starts)
    best = min(range(len(candidates)), key=lambda i: (candidates[i][0], i))  # ties: the FastMCD result
    logdet, location, covariance, raw_support = candidates[best]
    if not np.isfinite(logdet):
        raise InputError("the robust covariance is singular: at least h samples lie in a lower-dimensional plane")
    final_location, final_covariance, keep = _reweight(Y, h, location, covariance)
    return McdFit(
        final_location, final_covariance, location, covariance, raw_support, keep,
        mahalanobis_sq(Y, final_location, final_covariance), sorted({str(w.message) for w in caught}),
    )


def _whitener(covariance: np.ndarray) -> np.ndarray:
    """W with (x W)(x W)' = x S^-1 x' (inverse Cholesky factor, transposed); InputError when S is singular."""
    try:
        chol = np.linalg.cholesky(covariance)
    except np.linalg.LinAlgError as exc:
        raise InputError(
            "the robust covariance is singular: at least h samples lie in a lower-dimensional plane "
            "(use fewer components or variables)"
        ) from exc
    return np.linalg.inv(chol).T


def mahalanobis_sq(Y: np.ndarray, location: np.ndarray, covariance: np.ndarray) -> np.ndarray:
    """Squared Mahalanobis distances (m,) of the rows of Y from ``location`` under ``covariance``."""
    w = (Y - location) @ _whitener(covariance)
    return np.einsum("ij,ij->i", w, w)


def _mean_cov(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and covariance with divisor = number of rows (as scikit-learn's empirical_covariance)."""
    mean = rows.mean(axis=0)
    centred = rows - mean
    return mean, centred.T @ centred / len(rows)


def _c_steps(Y, h, location, covariance):
    """C-steps from (location, covariance) until the determinant stops decreasing (Theorem 1 of FastMCD).

    Returns (log det, location, covariance, subset mask) of the last h-subset;
    log det = -inf when a subset is singular.
    """
    m = Y.shape[0]
    logdet, subset = np.inf, None
    for _ in range(C_STEP_MAX_ITER):
        new_subset = np.argpartition(mahalanobis_sq(Y, location, covariance), h - 1)[:h]
        new_location, new_covariance = _mean_cov(Y[new_subset])
        sign, new_logdet = np.linalg.slogdet(new_covariance)
        if sign <= 0:
            return -np.inf, new_location, new_covariance, np.zeros(m, dtype=bool)
        if subset is not None and new_logdet >= logdet:
            break  # a fixed point of the C-step
        improvement = logdet - new_logdet
        subset, logdet, location, covariance = new_subset, new_logdet, new_location, new_covariance
        if improvement <= C_STEP_TOL * (1.0 + abs(logdet)):
            break  # the determinant has settled (the stopping rule of scikit-learn's C-steps)
    mask = np.zeros(m, dtype=bool)
    mask[subset] = True
    return logdet, location, covariance, mask


def _reweight(Y, h, location, covariance) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Consistency correction and reweighting of a raw MCD (Rousseeuw & Van Driessen 1999).

    Raw distances over the factor for h/m, rows beyond the 97.5% chi-square
    quantile weighted 0, mean and covariance (divisor = rows kept) of the
    rest, times the factor for 0.975 (Croux & Haesbroeck 1999; Pison, Van
    Aelst & Willems 2002). Returns (location, covariance, rows kept).
    """
    m, q = Y.shape
    d2_raw = mahalanobis_sq(Y, location, covariance) / consistency_factor(q, h / m)
    keep = d2_raw < stats.chi2.ppf(REWEIGHT_LEVEL, q)
    final_location, final_covariance = _mean_cov(Y[keep])
    return final_location, final_covariance * consistency_factor(q, REWEIGHT_LEVEL), keep


# -------------------------------------------------------------- outlyingness
def univariate_mcd(values: np.ndarray, h: int) -> tuple[np.ndarray, np.ndarray]:
    """Univariate MCD location and scale of every row of ``values`` (d, m), h > m/2.

    The h-window of the sorted values with the smallest variance (Rousseeuw &
    Leroy 1987); location = its mean, scale = its SD (divisor h - 1; no
    consistency factor). Window sums are built outward from index m - h, which
    every window contains, so no sum reaches outside its window (no
    cancellation against far outliers). Rows, not columns: sorting and
    cumulative sums run along contiguous memory.
    """
    ys = np.sort(values, axis=1)
    m = ys.shape[1]
    a = m - h
    shift = ys[:, a].copy()
    ys -= shift[:, None]
    sq = ys * ys

    def window_sums(x: np.ndarray) -> np.ndarray:
        left = np.zeros((x.shape[0], a + 1))
        if a:
            left[:, :a] = np.cumsum(x[:, a - 1 :: -1], axis=1)[:, ::-1]  # sum of x[j:a], j = 0..a-1
        right = np.cumsum(x[:, a:], axis=1)[:, h - 1 - a :]  # sum of x[a:j+h], j = 0..a
        return left + right

    s1, s2 = window_sums(ys), window_sums(sq)
    ss = s2 - s1 * s1 / h
    best = np.argmin(ss, axis=1)
    rows = np.arange(ys.shape[0])
    location = s1[rows, best] / h + shift
    scale = np.sqrt(np.maximum(ss[rows, best], 0.0) / max(h - 1, 1))
    return location, scale


def outlyingness(Z: np.ndarray, h: int, n_directions: int, rng: np.random.Generator,
                 max_samples: int = PROJECTION_MAX_SAMPLES) -> np.ndarray:
    """Outlyingness (n,) of the rows of Z: max over directions v of |z'v - t_v| / s_v.

    v runs over the unit directions through pairs of rows (all pairs when
    there are at most ``n_directions``, else that many seeded random pairs);
    t_v, s_v are the univariate MCD location and scale of the projections
    with h of n rows (Hubert et al. 2005, stage 2). Directions with s_v = 0
    (more than h rows project to one value) are left out. Above
    ``max_samples`` rows, t_v and s_v come from a seeded subsample of that
    many rows (with the same share h/n); every row still gets its outlyingness.
    A constant consistency factor would scale every value alike, so none is used.
    """
    n = Z.shape[0]
    if n * (n - 1) // 2 <= n_directions:
        i, j = np.triu_indices(n, 1)
    else:
        i = rng.integers(n, size=n_directions)
        j = rng.integers(n - 1, size=n_directions)
        j += j >= i
    directions = Z[i] - Z[j]
    norms = np.linalg.norm(directions, axis=1)
    usable = norms > 1e-12 * max(float(norms.max()), np.finfo(float).tiny)
    directions = directions[usable] / norms[usable, None]
    if n > max_samples:
        rows = np.sort(rng.choice(n, size=max_samples, replace=False))
        sample, h_sample = Z[rows], max(int(h / n * max_samples), max_samples // 2 + 1)
    else:
        sample, h_sample = Z, h
    projected = directions @ sample.T  # (directions, rows)
    location, scale = univariate_mcd(projected, h_sample)
    spread = np.abs(projected - location[:, None]).max(axis=1)
    informative = scale > 1e-12 * np.maximum(spread, np.finfo(float).tiny)
    if not informative.any():
        raise InputError(f"more than h={h} samples coincide in every direction; robust PCA cannot separate them")
    # |z'v - t| / s = |z'(v/s) - t/s|: the scale is folded into the directions.
    inv_scale = 1.0 / scale[informative]
    scaled = np.ascontiguousarray((directions[informative] * inv_scale[:, None]).T)
    offset = location[informative] * inv_scale
    out = np.empty(n)
    for start in range(0, n, BLOCK_ROWS):
        block = Z[start : start + BLOCK_ROWS] @ scaled
        np.subtract(block, offset, out=block)
        np.abs(block, out=block)
        out[start : start + BLOCK_ROWS] = block.max(axis=1)
    return out


def _classical_pca(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean (q,), eigenvectors (q, q), eigenvalues (q,) descending of the covariance of ``rows`` (divisor m - 1).

    ``rows`` is overwritten (centred); pass a copy.
    """
    mean = rows.mean(axis=0)
    rows -= mean  # rows is a fresh copy (a fancy-indexed subset): centre it in place
    w, v = np.linalg.eigh(rows.T @ rows / (len(rows) - 1))
    return mean, v[:, ::-1], w[::-1]


def _plane_distances(Z: np.ndarray, centre: np.ndarray, basis: np.ndarray) -> np.ndarray:
    """Euclidean distance (n,) of each row of Z to the plane centre + span(basis) (orthonormal columns)."""
    out = np.empty(Z.shape[0])
    for start in range(0, Z.shape[0], BLOCK_ROWS):
        centred = Z[start : start + BLOCK_ROWS] - centre
        residual = centred - (centred @ basis) @ basis.T
        out[start : start + BLOCK_ROWS] = np.sqrt(np.einsum("ij,ij->i", residual, residual))
    return out


def _row_medians(rows: np.ndarray) -> np.ndarray:
    """Median of every row of a C-ordered (p, n) array, partitioned in place (one selection per row)."""
    n = rows.shape[1]
    half = n // 2
    rows.partition(half, axis=1)
    upper = rows[:, half].copy()
    return upper if n % 2 else 0.5 * (upper + rows[:, :half].max(axis=1))


# -------------------------------------------------------------------- model
class RobustPCAModel:
    """Robust principal component analysis by ROBPCA (Hubert, Rousseeuw & Vanden Branden 2005).

    Preprocessing: the same log10, variable checks and scaling names as
    ``PCAModel`` (through ``analysis.preprocessing.Preprocessor``). With
    ``scale_estimator="mad"`` (default) the location is the median and the
    scale the MAD (times 1.4826, consistent at the normal): ``autoscale``
    divides by the MAD, ``pareto`` by its square root, so one outlying sample
    cannot shrink a variable's weight. ``"sd"`` keeps the classical mean and
    SD of the Preprocessor, exactly as the classical model. Either way the
    model's centre is the robust one of stage 3; the preprocessing location
    only shifts the data (``none`` and ``center`` give the same model).
    Stage 1 reduces the data to their affine subspace (SVD of the centred
    data), so more variables than samples are handled. Missing values are
    not: the fit needs complete data.

    Parameters
    ----------
    n_components : int
        k, the number of robust components.
    scaling : {"none", "center", "autoscale", "pareto"}
    log10 : sequence of str
        Variables replaced by their base-10 logarithm before scaling.
    scale_estimator : {"mad", "sd"}
    alpha : float in [0.5, 1]
        Share of samples the fit must describe: h = max(int(alpha n), int((n + k + 1) / 2))
        (the paper's kmax is k here, since k is fixed beforehand).
    n_directions : int
        Directions of the outlyingness stage (250 in the paper).
    confidence : float
        Level of both cut-offs and of the OD screening in stage 3 (0.975 in the paper).
    random_state : int
        Seed of the directions, subsamples and FastMCD: the same seed gives the same numbers.
    drop_constant : bool
        As in PCAModel.
    mcd_max_samples, projection_max_samples : int
        Above these numbers of samples the MCD (``fit_mcd``) and the univariate
        MCD of the directions (``outlyingness``) start from a seeded subsample.

    Attributes
    ----------
    loadings_ : ndarray (p, k)          orthonormal; largest |element| of each column positive
    eigenvalues_ : ndarray (k,)         eigenvalues of the reweighted MCD scatter of the scores, descending
    center_ : ndarray (p,)              robust centre, in preprocessed units
    scores_ : ndarray (n, k)            (z - center_) loadings_
    score_distance_ : ndarray (n,)      SD = sqrt(sum_a t_a^2 / l_a)
    orthogonal_distance_ : ndarray (n,) OD = ||z - center_ - loadings_ t||
    sd_cutoff_, od_cutoff_ : float
    flags_ : ndarray of bool (n,)       beyond either cut-off
    regions_ : ndarray of str (n,)      one of REGIONS
    outlyingness_ : ndarray (n,)        stage-2 outlyingness (unscaled)
    h_subset_ : ndarray of bool (n,)    the h least outlying samples (H0)
    reweighted_subset_ : ndarray of bool (n,)  samples within the OD cut-off of the H0 plane (H1)
    support_ : ndarray of bool (n,)     samples kept by the MCD reweighting
    h_, n_components_, n_samples_, rank_ : int   (rank_ = r0 of stage 1)
    location_, scale_ : ndarray (p,)    preprocessing location and divisor (after log10)
    spread_ : ndarray (p,)              MAD (times 1.4826) or SD per variable: the unit of ``explain``
    od_moments_ : (float, float)        centre and spread of OD^(2/3) behind every OD cut-off
    explained_variance_ratio_, cumulative_explained_ : ndarray (k,)
    variable_explained_ : ndarray (p,), total_variance_ : float
                                        shares of the regular samples' sum of squares (see ``_explained``)

    The classical model's interface (``t2_``, ``spe_``, ``hotelling_t2``, ``spe``,
    ``t2_limit``, ``spe_limit``, ``contributions``) is kept with SD^2 for T2 and
    OD^2 for SPE and the squared cut-offs for the limits, so tables, contributions
    and comparisons treat both fits alike.
    sample_ids_, variable_names_, dropped_variables_, warnings_ : list[str]

    References
    ----------
    See the module docstring.
    """

    def __init__(
        self,
        n_components: int = 2,
        scaling: str = "autoscale",
        log10=(),
        scale_estimator: str = "mad",
        alpha: float = 0.75,
        n_directions: int = N_DIRECTIONS,
        confidence: float = 0.975,
        random_state: int = 0,
        drop_constant: bool = False,
        mcd_max_samples: int = MCD_MAX_SAMPLES,
        projection_max_samples: int = PROJECTION_MAX_SAMPLES,
    ):
        self.n_components = n_components
        self.scaling = scaling
        self.log10 = log10
        self.scale_estimator = scale_estimator
        self.alpha = alpha
        self.n_directions = n_directions
        self.confidence = confidence
        self.random_state = random_state
        self.drop_constant = drop_constant
        self.mcd_max_samples = mcd_max_samples
        self.projection_max_samples = projection_max_samples

    # ------------------------------------------------------------------ fit
    def fit(self, X, sample_ids=None, variable_names=None) -> RobustPCAModel:
        """Fit to X (n x p, complete; ndarray or DataFrame). On InputError the model is left as it was."""
        before = dict(self.__dict__)
        try:
            return self._fit(X, sample_ids, variable_names)
        except InputError:
            self.__dict__.clear()
            self.__dict__.update(before)
            raise

    def _check_parameters(self) -> int:
        if self.scaling not in SCALINGS:
            raise InputError(f"scaling={self.scaling!r} is not one of {', '.join(SCALINGS)}")
        if self.scale_estimator not in SCALE_ESTIMATORS:
            raise InputError(f"scale_estimator={self.scale_estimator!r} is not one of {', '.join(SCALE_ESTIMATORS)}")
        diagnostics.check_confidence(self.confidence)
        for name in ("n_components", "n_directions", "mcd_max_samples", "projection_max_samples", "random_state"):
            value = getattr(self, name)
            least = 0 if name == "random_state" else 1
            if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < least:
                raise InputError(f"{name}={value!r} must be a whole number of at least {least}")
        if not isinstance(self.alpha, (int, float, np.floating)) or not 0.5 <= self.alpha <= 1.0:
            raise InputError(f"alpha={self.alpha!r} must lie between 0.5 and 1")
        return int(self.n_components)

    def _fit(self, X, sample_ids, variable_names) -> RobustPCAModel:
        k = self._check_parameters()
        values, ids, names, complete, column_sums = validated(X, sample_ids, variable_names, default_ids=False)
        if not complete:
            raise InputError(
                f"robust PCA needs complete data; {int(np.isnan(values).sum())} value(s) are missing "
                "(remove or impute those samples first)"
            )
        n = values.shape[0]
        if n < 3:
            raise InputError(f"at least 3 samples are needed, got {n}")
        p = values.shape[1]
        # Tall data: the centred cross-product for stage 1 comes out of the moments pass.
        tall = n >= p
        prep = Preprocessor(self.scaling, self.log10, self.drop_constant).fit(
            values, ids, names, gram=tall, column_sums=column_sums
        )
        if prep.dropped_variables_:
            values = values[:, prep.keep_]
        if ids is None:
            self.__dict__.pop("sample_ids_", None)  # row numbers, built on first use
        else:
            self.sample_ids_ = ids
        self.feature_names_in_ = names
        self.variable_names_ = prep.variable_names_
        self.dropped_variables_ = prep.dropped_variables_
        self.warnings_ = list(prep.warnings_)
        self._log_mask = prep.log_mask_
        self.location_, self.scale_, self.spread_ = self._preprocessing(values, prep)
        z = scale_block(values, self._log_mask, self.location_, self.scale_)
        p = z.shape[1]
        rng = np.random.default_rng(self.random_state)

        # Stage 1: the affine subspace of the data (Hubert et al. 2005, stage 1).
        if tall:
            # Centred cross-product of z: the Preprocessor's (of unscaled values) over the divisors.
            w, v = np.linalg.eigh(prep.gram_ / np.outer(self.scale_, self.scale_))
            w, v = np.clip(w[::-1], 0.0, None), v[:, ::-1]
        else:
            _, s, vt = np.linalg.svd(z - z.mean(axis=0), full_matrices=False)
            w, v = s**2, vt.T
        r0 = numerical_rank(w / (n - 1), n, p)
        if k > r0:
            raise InputError(f"n_components={k} exceeds the {r0} dimensions the preprocessed data span")
        if r0 == p:
            # A rotation changes nothing below (every step is rotation and shift equivariant): keep z.
            basis, origin, reduced = None, np.zeros(p), z
        else:
            basis, origin = v[:, :r0], z.mean(axis=0)
            reduced = (z - origin) @ basis

        # Stage 2: the h least outlying samples (H0) and their classical PCA (Hubert et al. 2005, stage 2).
        # h = max([alpha n], [(n + kmax + 1) / 2]) with kmax = k: the fit has a fixed number of components.
        h = min(n, max(int(self.alpha * n), (n + k + 1) // 2))
        if h <= k:
            raise InputError(f"n_components={k} needs more than {k} samples in the h-subset (h={h})")
        outl = outlyingness(reduced, h, int(self.n_directions), rng, int(self.projection_max_samples))
        subset = np.argpartition(outl, h - 1)[:h]
        m0, v0, w0 = _classical_pca(reduced[subset])
        r1 = numerical_rank(np.clip(w0, 0.0, None), h, reduced.shape[1])
        if k > r1:
            raise InputError(f"n_components={k} exceeds the {r1} dimensions the h={h} least outlying samples span")
        # Reweighting (Hubert et al. 2005, stage 3): keep the samples whose OD to the stage-2 plane is within its
        # cut-off (H1) and take their classical PCA; skipped when k = r0 (every OD is 0).
        h1 = np.ones(n, dtype=bool)
        if k < reduced.shape[1]:
            od0 = _plane_distances(reduced, m0, v0[:, :k])
            h1 = od0 <= od_cutoff(od0, h, self.confidence)
            m0, v0, w0 = _classical_pca(reduced[h1])
            r1 = numerical_rank(np.clip(w0, 0.0, None), int(h1.sum()), reduced.shape[1])
            if k > r1:
                raise InputError(f"n_components={k} exceeds the {r1} dimensions the reweighted samples span")
        p0 = v0[:, :k]
        projected = reduced @ p0
        projected -= m0 @ p0

        # Stage 3: reweighted MCD in the k-dimensional space, also started from the stage-2
        # estimate (0, diag(l)); its eigenvectors give the loadings.
        start = (np.zeros(k), np.diag(np.clip(w0[:k], np.finfo(float).tiny, None)))
        mcd = fit_mcd(projected, h, int(self.random_state), int(self.mcd_max_samples), starts=[start])
        self.warnings_.extend(mcd.warnings)
        lam, p2 = np.linalg.eigh(mcd.covariance)
        lam, p2 = lam[::-1], p2[:, ::-1]
        if lam[-1] <= 0:
            raise InputError(f"the robust scatter of the {k} components is singular; use fewer components")
        inner = p0 @ p2
        centre = m0 + p0 @ mcd.location
        self.loadings_ = _sign_convention(inner if basis is None else basis @ inner)
        self.eigenvalues_ = lam
        self.center_ = origin + (centre if basis is None else basis @ centre)
        self.h_ = h
        self.rank_ = r0
        self.n_samples_ = n
        self.n_components_ = k
        self.outlyingness_ = outl
        self.h_subset_ = np.zeros(n, dtype=bool)
        self.h_subset_[subset] = True
        self.reweighted_subset_ = h1
        self.support_ = np.asarray(mcd.support, dtype=bool)

        self.scores_, self.score_distance_, od = self._distances(values)
        if k == r0:
            od[:] = 0.0  # the model spans every direction the training data have
        self.orthogonal_distance_ = od
        self.od_moments_ = (0.0, 0.0) if k == r0 else od_root_moments(od, h)
        self.sd_cutoff_, self.od_cutoff_ = self.cutoffs()
        self.regions_ = self.classify(self.score_distance_, od)
        self.flags_ = self.regions_ != REGIONS[0]
        self._explained(z, ~self.flags_)
        self.n_missing_ = 0
        self.solver_ = "robpca"
        return self

    def _explained(self, z: np.ndarray, regular: np.ndarray) -> None:
        """Shares of the regular samples' sum of squares about the robust centre.

        ROBPCA has no total variance of its own (Hubert et al. 2005 report the
        robust eigenvalues). The shares here are ours: over the samples in the
        regular region, component a explains sum t_a^2 / sum ||z - c||^2, and
        variable j the share 1 - sum e_j^2 / sum (z_j - c_j)^2 of its own sum of
        squares, with e = z - c - t P' and
        sum e_j^2 = sum (z_j - c_j)^2 - 2 P_j'[(Z - c)'T]_j + P_j' (T'T) P_j
        (sums over the regular samples; no residual matrix is formed).
        """
        weight = regular.astype(np.float64)
        scores = self.scores_
        weighted = scores * weight[:, None]
        per_component = np.einsum("ij,ij->j", weighted, scores)
        column_ss = np.zeros(z.shape[1])
        for start in range(0, z.shape[0], BLOCK_ROWS):
            centred = z[start : start + BLOCK_ROWS] - self.center_
            column_ss += weight[start : start + BLOCK_ROWS] @ (centred * centred)
        cross = z.T @ weighted - np.outer(self.center_, weighted.sum(axis=0))  # (Z - c)'T over the regular rows
        loadings = self.loadings_
        residual_ss = (column_ss - 2.0 * np.einsum("ja,ja->j", loadings, cross)
                       + np.einsum("ja,ab,jb->j", loadings, scores.T @ weighted, loadings))
        total = float(column_ss.sum())
        self.total_variance_ = total / max(int(regular.sum()) - 1, 1)
        self.explained_variance_ratio_ = per_component / total if total > 0 else np.zeros_like(per_component)
        self.cumulative_explained_ = np.cumsum(self.explained_variance_ratio_)
        with np.errstate(divide="ignore", invalid="ignore"):
            share = 1.0 - residual_ss / column_ss
        self.variable_explained_ = np.clip(np.nan_to_num(share, nan=0.0), 0.0, 1.0)

    @functools.cached_property
    def sample_ids_(self) -> list[str]:
        """Training sample ids; fitted without ids, the row numbers "1", "2", ... built on first use."""
        if "n_samples_" not in self.__dict__:
            raise AttributeError("sample_ids_ is set by fit")
        return default_sample_ids(self.n_samples_)

    def _preprocessing(self, values: np.ndarray, prep: Preprocessor) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Location, divisor and spread per variable: the Preprocessor's (spread: SD), or
        median, MAD-based divisor and MAD (see the class). The spread is the unit of the
        explanations (``explain``)."""
        if self.scale_estimator == "sd" or self.scaling == "none":
            return prep.mean_, prep.scale_, prep.sd_
        columns = np.array(apply_log10(values, self._log_mask).T, order="C")  # one contiguous row per variable
        median = _row_medians(columns)
        np.subtract(columns, median[:, None], out=columns)
        np.abs(columns, out=columns)
        mad = _row_medians(columns) / stats.norm.ppf(0.75)
        if self.scaling == "center":
            return median, np.ones_like(median), mad
        zero = mad <= 64 * np.finfo(float).eps * np.abs(median)
        if zero.any():
            names = [v for v, z in zip(self.variable_names_, zero) if z]
            raise InputError(
                f"variable(s) with a MAD of 0 (more than half the values equal) cannot be scaled robustly: "
                f"{', '.join(names[:10])}; use scale_estimator='sd' or leave them out"
            )
        return median, (mad if self.scaling == "autoscale" else np.sqrt(mad)), mad

    # ------------------------------------------------------------- new data
    def _matrix(self, X, allow_missing: bool = False) -> np.ndarray:
        """Raw values of X in the model's variable order (DataFrames by column name).

        InputError for a missing value unless ``allow_missing`` (the distances of an
        incomplete row are then NaN: ROBPCA has no rule for missing values)."""
        if isinstance(X, pd.Series):
            X = X.to_frame().T
        if isinstance(X, pd.DataFrame):
            columns = [str(c) for c in X.columns]
            absent = [v for v in self.variable_names_ if v not in columns]
            if absent:
                raise InputError(f"variable(s) missing from the data: {', '.join(absent[:10])}")
            label = dict(zip(columns, X.columns))
            values, ids, _, complete, _ = validated(X[[label[v] for v in self.variable_names_]], default_ids=False)
        else:
            values = np.asarray(X, dtype=np.float64)
            if values.ndim == 1:
                values = values[None, :]
            p_model, p_input = len(self.variable_names_), len(self.feature_names_in_)
            if values.ndim != 2 or values.shape[1] not in (p_model, p_input):
                raise InputError(f"data have {values.shape[-1]} columns; the model expects {p_model}")
            names = self.variable_names_ if values.shape[1] == p_model else self.feature_names_in_
            values, ids, _, complete, _ = validated(values, variable_names=names, default_ids=False)
            if values.shape[1] != p_model:
                values = values[:, [names.index(v) for v in self.variable_names_]]
        if not complete and not allow_missing:
            raise InputError("robust PCA scores need complete rows; a value is missing")
        check_log10(values, self._log_mask, ids, self.variable_names_)
        return values

    def preprocess(self, X) -> np.ndarray:
        """log10, location and scale learned at fit, applied to X -> (m, p)."""
        return scale_block(self._matrix(X), self._log_mask, self.location_, self.scale_)

    def _distances(self, values: np.ndarray):
        """Scores (m, k), SD (m,) and OD (m,) of raw rows, in row blocks (no preprocessed copy)."""
        # z - center = (x - (location + center * scale)) / scale after log10.
        shift = self.location_ + self.center_ * self.scale_
        scores, od2 = _scores_and_spe_blocks(values, self._log_mask, shift, self.scale_, self.loadings_, complete=True)
        incomplete = np.isnan(values).any(axis=1)
        if incomplete.any():
            scores[incomplete], od2[incomplete] = np.nan, np.nan
        sd = np.sqrt(diagnostics.hotelling_t2(scores, self.eigenvalues_))
        return scores, sd, np.sqrt(od2)

    def transform(self, X) -> np.ndarray:
        """Robust scores (m, k) of the samples in X (NaN for a row with a missing value)."""
        return self._distances(self._matrix(X, allow_missing=True))[0]

    def score_distance(self, X) -> np.ndarray:
        """Score distance SD (m,) of the samples in X (NaN for a row with a missing value)."""
        return self._distances(self._matrix(X, allow_missing=True))[1]

    def orthogonal_distance(self, X) -> np.ndarray:
        """Orthogonal distance OD (m,) of the samples in X to the robust model plane (0 when k = p;
        NaN for a row with a missing value)."""
        return self._distances(self._matrix(X, allow_missing=True))[2]

    def diagnose(self, X) -> dict:
        """Scores, SD, OD, region and flag of the samples in X against the training cut-offs."""
        scores, sd, od = self._distances(self._matrix(X))
        regions = self.classify(sd, od)
        return {"scores": scores, "score_distance": sd, "orthogonal_distance": od,
                "regions": regions, "flags": regions != REGIONS[0],
                "sd_cutoff": self.sd_cutoff_, "od_cutoff": self.od_cutoff_}

    def classify(self, score_distance, orthogonal_distance) -> np.ndarray:
        """Region of each sample (the outlier map of Hubert et al. 2005, in our words; see REGIONS)."""
        far = np.asarray(score_distance) > self.sd_cutoff_
        off = np.asarray(orthogonal_distance) > self.od_cutoff_
        return np.asarray(REGIONS)[far.astype(int) + 2 * off.astype(int)]

    # ------------------------------------------------- cut-offs at any level
    def cutoffs(self, confidence=None) -> tuple[float, float]:
        """(SD cut-off, OD cut-off) at ``confidence`` (default: the fit's level).

        SD: sqrt(chi2_{k, conf}); OD: (t + s z_conf)^(3/2) with t, s the reweighted
        univariate MCD of the training OD^(2/3) (Hubert et al. 2005, section 3.4;
        Wilson & Hilferty 1931). The paper uses conf = 0.975.
        """
        conf = diagnostics.check_confidence(self.confidence if confidence is None else confidence)
        sd = float(np.sqrt(stats.chi2.ppf(conf, self.n_components_)))
        return sd, od_cutoff_from(*self.od_moments_, conf)

    # ----------------------------------------- the classical model's interface
    @property
    def t2_(self) -> np.ndarray:
        """SD^2 of the training samples (the robust Hotelling-type distance within the model)."""
        return self.score_distance_**2

    @property
    def spe_(self) -> np.ndarray:
        """OD^2 of the training samples (squared residual to the robust plane)."""
        return self.orthogonal_distance_**2

    def hotelling_t2(self, X) -> np.ndarray:
        """SD^2 (m,) of the samples in X."""
        return self.score_distance(X) ** 2

    def spe(self, X) -> np.ndarray:
        """OD^2 (m,) of the samples in X."""
        return self.orthogonal_distance(X) ** 2

    def t2_limit(self, confidence=None, new: bool = False) -> float:
        """Squared SD cut-off. ``new`` changes nothing: the chi-square cut-off of
        Hubert et al. (2005) is the same for training and new samples."""
        return self.cutoffs(confidence)[0] ** 2

    def spe_limit(self, confidence=None) -> float:
        """Squared OD cut-off (see ``cutoffs``)."""
        return self.cutoffs(confidence)[1] ** 2

    def explain(self, x, sample_id=None, top: int = 3, confidence=None) -> dict:
        """Plain-language explanation of one raw row x, as ``analysis.diagnostics.explain_sample``
        words it for the classical model, in score and orthogonal distances.

        The distance beyond its cut-off by the larger ratio decides which
        contributions are explained: OD^2 (squared residuals to the robust plane)
        or SD^2 (Westerhuis, Gurden & Smilde 2000 in the robust score space).
        Values are given in units of ``spread_`` (robust SDs with the MAD) from
        the robust centre. ``sample_id`` is accepted for symmetry; the cut-offs are
        the same for training and new samples. Returns the keys of
        ``explain_sample`` (``t2`` = SD^2, ``spe`` = OD^2, limits squared) plus
        ``score_distance``, ``orthogonal_distance``, ``sd_cutoff`` and ``od_cutoff``.
        """
        del sample_id
        z = self.preprocess(x)
        if z.shape[0] != 1:
            raise InputError(f"expected one sample, got {z.shape[0]}")
        centred = z[0] - self.center_
        scores = centred @ self.loadings_
        residual = centred - self.loadings_ @ scores
        if self.n_components_ == len(self.variable_names_):
            residual = np.zeros_like(centred)
        spe_c = diagnostics.spe_contributions(residual)
        t2_c = diagnostics.t2_contributions(centred, self.loadings_, self.eigenvalues_)
        sd = float(np.sqrt(diagnostics.hotelling_t2(scores[None, :], self.eigenvalues_)[0]))
        od = float(np.sqrt(spe_c.sum()))
        sd_cut, od_cut = self.cutoffs(confidence)
        with np.errstate(divide="ignore", invalid="ignore"):
            unit = np.where(self.spread_ > 0, self.scale_ / self.spread_, np.nan)
        standardized, residual_units = centred * unit, residual * unit
        sd_ratio = sd / sd_cut
        od_ratio = od / od_cut if od_cut > 0 else (np.inf if od > 0 else 0.0)
        driver = "spe" if od_ratio > sd_ratio else "t2"
        drive = spe_c if driver == "spe" else t2_c
        order = np.argsort(-np.abs(drive), kind="stable")
        names = self.variable_names_

        def number(value) -> float | None:
            return None if not np.isfinite(value) else float(value)

        variables = [
            {"variable": names[j], "spe_contribution": float(spe_c[j]), "t2_contribution": float(t2_c[j]),
             "residual": float(residual[j]), "standardized_value": number(standardized[j])}
            for j in order
        ]

        def phrase(j: int) -> str:
            if driver == "spe":
                r = residual_units[j]
                return f"{names[j]}, {abs(r):.1f} robust SD {'higher' if r > 0 else 'lower'} than the model predicts"
            v = standardized[j]
            return f"{names[j]}, {abs(v):.1f} robust SD {'above' if v > 0 else 'below'} the robust centre"

        chosen = [j for j in order if drive[j] > 0][: max(int(top), 1)]
        reasons = "; ".join(phrase(j) for j in chosen)
        level = f"{(self.confidence if confidence is None else confidence):.1%}".replace(".0%", "%")
        sd_text = f"score distance {sd:.3g}, {level} cut-off {sd_cut:.3g}"
        od_text = f"orthogonal distance {od:.3g}, {level} cut-off {od_cut:.3g}"
        if sd > sd_cut or od > od_cut:
            head = (f"Far along the robust model ({sd_text}) mainly because of " if driver == "t2"
                    else f"Off the robust model plane ({od_text}) mainly because of ")
            sentence = head + (reasons or "no single variable") + "."
        else:
            sentence = f"Within both cut-offs ({sd_text}; {od_text})."
            if reasons:
                sentence += f" Largest deviations: {reasons}."
        return {
            "sentence": sentence, "t2": sd**2, "spe": od**2, "t2_limit": sd_cut**2, "spe_limit": od_cut**2,
            "score_distance": sd, "orthogonal_distance": od, "sd_cutoff": sd_cut, "od_cutoff": od_cut,
            "driver": driver, "variables": variables,
        }

    def contributions(self, x, kind: str = "spe") -> np.ndarray:
        """Per-variable contributions (p,) of one raw row x.

        ``spe``: squared residuals to the robust plane; they sum to OD^2.
        ``t2``: c_j = sum_a (t_a / l_a) p_ja (z_j - c_j) with the robust centre c and
        eigenvalues l (Westerhuis, Gurden & Smilde 2000, in the robust score space);
        they sum to SD^2.
        """
        if kind not in ("spe", "t2"):
            raise InputError(f"kind={kind!r} must be 'spe' or 't2'")
        z = self.preprocess(x)
        if z.shape[0] != 1:
            raise InputError(f"expected one sample, got {z.shape[0]}")
        centred = z[0] - self.center_
        if kind == "t2":
            return diagnostics.t2_contributions(centred, self.loadings_, self.eigenvalues_)
        if self.n_components_ == len(self.variable_names_):
            return np.zeros_like(centred)
        residual = centred - self.loadings_ @ (centred @ self.loadings_)
        return diagnostics.spe_contributions(residual)

    def regions_at(self, confidence=None) -> np.ndarray:
        """Region of each training sample against the cut-offs at ``confidence`` (see ``classify``)."""
        sd_cut, od_cut = self.cutoffs(confidence)
        far = self.score_distance_ > sd_cut
        off = self.orthogonal_distance_ > od_cut
        return np.asarray(REGIONS)[far.astype(int) + 2 * off.astype(int)]

    def first_step(self) -> str:
        """How stage 1 reduced the dimension, in words (Hubert et al. 2005, section 3.1)."""
        n, p = self.n_samples_, len(self.variable_names_)
        if self.rank_ == p:
            return f"The {n} samples span all {p} variables: stage 1 keeps every dimension."
        more = " (more variables than samples)" if p > n else ""
        return (f"Stage 1 reduced the {p} variables{more} to the {self.rank_} dimensions the {n} samples "
                "span, by a singular value decomposition of the centred data, before the robust steps.")

    def fit_summary(self, confidence=None) -> dict:
        """The robust fit's settings, subset size h and cut-offs (at ``confidence``,
        default the fit's level) for summary.json and the API."""
        conf = float(self.confidence if confidence is None else confidence)
        sd_cut, od_cut = self.cutoffs(conf)
        regions = self.regions_at(conf)
        counts = {r: int(np.sum(regions == r)) for r in REGIONS}
        return {
            "method": "robust",
            "algorithm": "ROBPCA (Hubert, Rousseeuw & Vanden Branden 2005) with FastMCD "
                         "(Rousseeuw & Van Driessen 1999, scikit-learn MinCovDet)",
            "n_components": self.n_components_,
            "alpha": float(self.alpha),
            "h": self.h_,
            "confidence": conf,
            "sd_cutoff": sd_cut,
            "od_cutoff": od_cut,
            "sd_cutoff_rule": "sqrt of the chi-square quantile with k degrees of freedom",
            "od_cutoff_rule": "(t + s z)^(3/2), t and s the reweighted univariate MCD of OD^(2/3) (Wilson-Hilferty)",
            "reweighting_level": float(self.confidence),
            "n_flagged": int(np.sum(regions != REGIONS[0])),
            "regions": counts,
            "rank": int(self.rank_),
            "first_step": self.first_step(),
            "scaling": self.scaling,
            "scale_estimator": self.scale_estimator,
            "random_state": int(self.random_state),
            "eigenvalues": [float(v) for v in self.eigenvalues_],
        }


def od_cutoff(od: np.ndarray, h: int, confidence: float) -> float:
    """Cut-off of the orthogonal distances: (t + s z_conf)^(3/2), Hubert et al. (2005).

    OD^(2/3) is taken as roughly normal (Wilson & Hilferty 1931); its centre t
    and spread s are the reweighted univariate MCD of the OD^(2/3) with h of
    n values (as the paper writes, and as the authors' LIBRA code computes):
    the h-window of smallest variance, variance (divisor h) times the
    consistency factor for h/n, values beyond the 97.5% chi-square(1) quantile
    dropped, mean and variance of the rest times the factor for 0.975.
    z_conf is the standard normal quantile. When more than h of the OD^(2/3)
    coincide (every OD 0 when the model spans the data) the cut-off is their value.
    """
    return od_cutoff_from(*od_root_moments(od, h), confidence)


def od_root_moments(od: np.ndarray, h: int) -> tuple[float, float]:
    """Centre t and spread s of OD^(2/3): the reweighted univariate MCD with h of n values.

    The two numbers behind every OD cut-off (see ``od_cutoff``); s is 0 when more
    than h of the OD^(2/3) coincide.
    """
    root = np.asarray(od, dtype=float).ravel() ** (2.0 / 3.0)
    location, scale = univariate_mcd(root[None, :], h)
    variance = float(scale[0]) ** 2 * (h - 1) / h
    if variance <= (64 * np.finfo(float).eps * max(abs(float(location[0])), np.finfo(float).tiny)) ** 2:
        return float(location[0]), 0.0
    centre, spread2, _ = _reweight(root[:, None], h, location, np.array([[variance]]))
    return float(centre[0]), float(np.sqrt(spread2[0, 0]))


def od_cutoff_from(centre: float, spread: float, confidence: float) -> float:
    """(t + s z_conf)^(3/2) from the moments of OD^(2/3) (Hubert et al. 2005; Wilson & Hilferty 1931)."""
    value = centre + spread * float(stats.norm.ppf(confidence)) if spread > 0 else centre
    return float(max(value, 0.0) ** 1.5)


def compare_flags(classical_flags, robust_flags, sample_ids) -> dict:
    """Samples flagged only by the robust fit, only by the classical fit, and by both.

    Returns {"robust_only": [ids], "classical_only": [ids], "both": [ids],
    "counts": {"robust_only": int, "classical_only": int, "both": int, "neither": int}},
    ids in the order given.
    """
    classical = np.asarray(classical_flags, dtype=bool).ravel()
    robust = np.asarray(robust_flags, dtype=bool).ravel()
    ids = [str(s) for s in sample_ids]
    if not len(classical) == len(robust) == len(ids):
        raise InputError(
            f"flags and sample ids differ in length: classical {len(classical)}, robust {len(robust)}, ids {len(ids)}"
        )
    groups = {
        "robust_only": robust & ~classical,
        "classical_only": classical & ~robust,
        "both": classical & robust,
    }
    out = {name: [ids[i] for i in np.flatnonzero(mask)] for name, mask in groups.items()}
    out["counts"] = {name: int(mask.sum()) for name, mask in groups.items()}
    out["counts"]["neither"] = int(np.sum(~classical & ~robust))
    return out
