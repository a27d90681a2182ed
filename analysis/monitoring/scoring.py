"""Scores, T², SPE and their limits for new samples, with the optional combined index.

New samples are scored with the reference model's own code path, so the
numbers here equal ``PCAModel.transform`` / ``hotelling_t2`` / ``spe`` (and
so the offline ``latentdesk apply``) to the last bit.

Missing values in a new sample: scores by projection to the model plane
(PMP), t = (P_o'P_o)^+ P_o' z_o over the observed variables (Nelson, Taylor &
MacGregor 1996), the method ``PCAModel.transform`` uses. Trimmed score
regression is not used: it needs the full covariance of the training data,
which the model file does not hold. SPE of an incomplete sample is summed
over its observed variables and compared with the same limits (common
practice); such samples are marked ``incomplete``.

References
----------
Tracy, N.D., Young, J.C., Mason, R.L. (1992) Multivariate control charts for
    individual observations. Journal of Quality Technology 24(2), 88-95;
    NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.3.
Jackson, J.E., Mudholkar, G.S. (1979) Control procedures for residuals
    associated with principal component analysis. Technometrics 21(3), 341-349.
Box, G.E.P. (1954) Some theorems on quadratic forms applied in the study of
    analysis of variance problems I. Annals of Mathematical Statistics 25, 290-302.
Nelson, P.R.C., Taylor, P.A., MacGregor, J.F. (1996) Missing data methods in
    PCA and PLS: score calculations with incomplete observations.
    Chemometrics and Intelligent Laboratory Systems 35, 45-65.
Yue, H.H., Qin, S.J. (2001) Reconstruction-based fault identification using a
    combined index. Industrial & Engineering Chemistry Research 40, 4403-4414.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from analysis import diagnostics
from analysis.errors import InputError
from analysis.monitoring.limits import (
    DEFAULT_CONFIDENCE_LEVELS,
    MEDIAN,
    ChartLimits,
    check_confidence_levels,
    score_limits,
)
from analysis.pca import PCAModel
from analysis.preprocessing import default_sample_ids, row_label


@dataclass(frozen=True, eq=False)
class NewSampleScores:
    """Scores, T², SPE and limits of new samples (m samples, A components).

    Attributes
    ----------
    sample_ids : list[str]
    scores : ndarray (m, A)
    t2, spe : ndarray (m,)
    incomplete : ndarray bool (m,)       True where a value was missing (scores by projection)
    t2_chart, spe_chart : ChartLimits    new-observation limits; centre = median
    score_charts : tuple[ChartLimits, ...]   one per component (``score_limits``)
    confidence_levels : (float, float)   warning, action
    spe_method : str
    combined : ndarray (m,) or None      Yue & Qin (2001) combined index phi
    combined_chart : ChartLimits or None
    """

    sample_ids: list
    scores: np.ndarray
    t2: np.ndarray
    spe: np.ndarray
    incomplete: np.ndarray
    t2_chart: ChartLimits
    spe_chart: ChartLimits
    score_charts: tuple
    confidence_levels: tuple
    spe_method: str
    combined: np.ndarray | None = None
    combined_chart: ChartLimits | None = None

    @property
    def t2_exceeds_warning(self) -> np.ndarray:
        return self.t2 > self.t2_chart.warning

    @property
    def t2_exceeds_action(self) -> np.ndarray:
        return self.t2 > self.t2_chart.action

    @property
    def spe_exceeds_warning(self) -> np.ndarray:
        return self.spe > self.spe_chart.warning

    @property
    def spe_exceeds_action(self) -> np.ndarray:
        return self.spe > self.spe_chart.action

    @property
    def combined_exceeds_warning(self) -> np.ndarray | None:
        return None if self.combined is None else self.combined > self.combined_chart.warning

    @property
    def combined_exceeds_action(self) -> np.ndarray | None:
        return None if self.combined is None else self.combined > self.combined_chart.action

    @property
    def flagged(self) -> np.ndarray:
        """True where T² or SPE exceeds its action limit (the combined index is shown, not flagged on)."""
        return self.t2_exceeds_action | self.spe_exceeds_action

    def to_frame(self) -> pd.DataFrame:
        """One row per sample (index "sample"): PC1..PCA, t2, spe, the exceed flags, incomplete, combined."""
        columns = {f"PC{a + 1}": self.scores[:, a] for a in range(self.scores.shape[1])}
        columns.update(
            t2=self.t2,
            spe=self.spe,
            t2_exceeds_warning=self.t2_exceeds_warning,
            t2_exceeds_action=self.t2_exceeds_action,
            spe_exceeds_warning=self.spe_exceeds_warning,
            spe_exceeds_action=self.spe_exceeds_action,
            incomplete=self.incomplete,
        )
        if self.combined is not None:
            columns.update(
                combined=self.combined,
                combined_exceeds_warning=self.combined_exceeds_warning,
                combined_exceeds_action=self.combined_exceeds_action,
            )
        return pd.DataFrame(columns, index=pd.Index(self.sample_ids, name="sample"))


def score_new_samples(
    model: PCAModel,
    X,
    confidence_levels=DEFAULT_CONFIDENCE_LEVELS,
    spe_method: str = "jackson-mudholkar",
    combined: bool = False,
) -> NewSampleScores:
    """Score new samples against a reference model, with limits for new observations.

    Parameters
    ----------
    model : PCAModel
        Fitted, or read from a model file (``analysis.modelfile``).
    X : DataFrame (columns matched to the model's variables by name; index = sample ids)
        or ndarray (m, p) in the model's variable order. NaN marks a missing value.
    confidence_levels : (warning, action)
    spe_method : {"jackson-mudholkar", "box"}
        SPE limit: Jackson & Mudholkar (1979) or Box (1954).
    combined : bool
        Also compute the combined index phi (Yue & Qin 2001), see below.

    Notes
    -----
    Scores and SPE come from the model's own block code path and T² from
    ``diagnostics.hotelling_t2``: on the same input they equal
    ``model.transform(X)``, ``model.hotelling_t2(X)`` and ``model.spe(X)``
    bit for bit. Incomplete rows are scored by projection to the model plane
    (Nelson, Taylor & MacGregor 1996; module docstring).

    T² limit for new observations (Tracy, Young & Mason 1992; NIST/SEMATECH
    e-Handbook 6.5.4.3): A (n+1)(n-1) / (n (n-A)) F(A, n-A). SPE limit from the
    discarded eigenvalues. Centre lines: the same formulas at 50 %.

    Combined index (Yue & Qin 2001): phi = SPE/delta^2 + T²/tau^2 with
    delta^2 the SPE limit and tau^2 = chi2_c(A) at the action level c, as in
    the paper. Its limit at level b is g chi2_b(h), g = tr((S Phi)^2)/tr(S Phi),
    h = tr(S Phi)^2 / tr((S Phi)^2), where tr(S Phi) = A/tau^2 + theta1/delta^2
    and tr((S Phi)^2) = A/tau^4 + theta2/delta^4 (theta_i = sum of discarded
    lambda^i). It needs discarded components (an SPE limit above 0).
    """
    levels = check_confidence_levels(confidence_levels)
    values, ids, incomplete = _new_rows(model, X)
    m = values.shape[0]
    scores, spe = model._scores_and_spe(values)  # the path of transform() and spe()
    t2 = diagnostics.hotelling_t2(scores, model.eigenvalues_)

    t2_warn, t2_act, t2_mid = (model.t2_limit(c, new=True) for c in (*levels, MEDIAN))
    spe_warn, spe_act, spe_mid = (model.spe_limit(c, spe_method) for c in (*levels, MEDIAN))
    phi, phi_chart = (None, None)
    if combined:
        phi, phi_chart = _combined_index(model, t2, spe, levels, spe_act)
    return NewSampleScores(
        sample_ids=default_sample_ids(m) if ids is None else list(ids),
        scores=scores,
        t2=t2,
        spe=spe,
        incomplete=incomplete,
        t2_chart=ChartLimits(t2_warn, t2_act, t2_mid),
        spe_chart=ChartLimits(spe_warn, spe_act, spe_mid),
        score_charts=tuple(score_limits(model, a, levels) for a in range(model.n_components_)),
        confidence_levels=levels,
        spe_method=spe_method,
        combined=phi,
        combined_chart=phi_chart,
    )


def _check_fitted(model) -> None:
    if not isinstance(model, PCAModel) or not hasattr(model, "loadings_"):
        raise InputError("a fitted PCAModel (or one read from a model file) is needed")


def _new_rows(model: PCAModel, X) -> tuple[np.ndarray, list | None, np.ndarray]:
    """Raw values of X in the model's variable order, sample ids (None for arrays) and the
    incomplete rows; InputError for no rows or a row without any of the model's variables."""
    _check_fitted(model)
    values, ids, complete = model._matrix(X)
    if values.shape[0] == 0:
        raise InputError("no samples to score")
    if complete:
        return values, ids, np.zeros(values.shape[0], dtype=bool)
    missing = np.isnan(values)
    empty = np.flatnonzero(missing.all(axis=1))
    if empty.size:
        raise InputError(
            f"sample(s) with none of the model's variables: {', '.join(row_label(ids, i) for i in empty[:10])}"
        )
    return values, ids, missing.any(axis=1)


def combined_index(model: PCAModel, t2, spe, confidence_levels=DEFAULT_CONFIDENCE_LEVELS,
                   spe_method: str = "jackson-mudholkar") -> tuple[np.ndarray, ChartLimits]:
    """(phi, its chart limits) of given T² and SPE values (Yue & Qin 2001; ``score_new_samples``)."""
    _check_fitted(model)
    levels = check_confidence_levels(confidence_levels)
    t2, spe = (np.asarray(v, dtype=np.float64).ravel() for v in (t2, spe))
    if t2.shape != spe.shape:
        raise InputError(f"T² and SPE must have one value per sample each, got {t2.size} and {spe.size}")
    return _combined_index(model, t2, spe, levels, model.spe_limit(levels[1], spe_method))


def _combined_index(model, t2, spe, levels, spe_action):
    """phi and its chart (Yue & Qin 2001); see ``score_new_samples``."""
    if spe_action <= 0.0:
        raise InputError(
            "the combined index needs discarded components: this model keeps every component, its SPE limit is 0"
        )
    a = model.n_components_
    discarded = np.clip(model.eigenvalues_[a:], 0.0, None)
    theta1, theta2 = float(np.sum(discarded)), float(np.sum(discarded**2))
    tau2 = float(stats.chi2.ppf(levels[1], a))
    delta2 = spe_action
    trace1 = a / tau2 + theta1 / delta2
    trace2 = a / tau2**2 + theta2 / delta2**2
    g, h = trace2 / trace1, trace1**2 / trace2
    warning, action, centre = (float(g * stats.chi2.ppf(c, h)) for c in (*levels, MEDIAN))
    return spe / delta2 + t2 / tau2, ChartLimits(warning, action, centre)
