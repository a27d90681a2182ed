"""Reconstruction-based contributions of the variables to SPE and T² of new samples.

Missing values take the model's estimate, scores by projection to the model
plane (Nelson, Taylor & MacGregor 1996), as in ``score_new_samples``.

References
----------
Alcala, C.F., Qin, S.J. (2009) Reconstruction-based contribution for process
    monitoring. Automatica 45, 1593-1600.
Nelson, P.R.C., Taylor, P.A., MacGregor, J.F. (1996) Missing data methods in
    PCA and PLS: score calculations with incomplete observations.
    Chemometrics and Intelligent Laboratory Systems 35, 45-65.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from analysis.monitoring.scoring import _new_rows
from analysis.pca import PCAModel
from analysis.preprocessing import default_sample_ids

RBC_DIRECTION_TOL = 1e-10  # C~_jj (or D_jj relative to its largest) below this: the direction is not reconstructable


@dataclass(frozen=True, eq=False)
class ReconstructionContributions:
    """Reconstruction-based contributions (m samples x p variables) to SPE and T².

    NaN where the sample's value is missing (not observed: nothing to
    reconstruct); 0 for a variable whose direction cannot be reconstructed
    (see ``reconstruction_contributions``).
    """

    sample_ids: list
    variable_names: list
    spe: np.ndarray
    t2: np.ndarray


def reconstruction_contributions(model: PCAModel, X) -> ReconstructionContributions:
    """Reconstruction-based contributions of every variable (Alcala & Qin 2009).

    In the preprocessed space, with xi_j the j-th unit vector, P the loadings
    and Lambda the kept eigenvalues:

        SPE: RBC_j = (xi_j' C~ x)^2 / (xi_j' C~ xi_j),  C~ = I - P P'
        T²:  RBC_j = (xi_j' D x)^2 / (xi_j' D xi_j),    D = P Lambda^-1 P'

    RBC_j is the amount by which the statistic falls when x is reconstructed
    along variable j. Alcala & Qin prove that a large enough fault along one
    variable gives that variable the largest RBC. Unlike squared residuals
    the RBC do not sum to the statistic.

    Rules: where C~_jj <= 1e-10 (variable j lies in the model plane, so a
    fault along it does not change SPE) the SPE RBC is 0; likewise the T² RBC
    where D_jj <= 1e-10 max(D_jj). Missing values (incomplete rows) take the
    model's estimate P t, t by projection to the model plane; then C~ x is the
    residual over the observed variables and P'x = t, so the statistics are
    those of ``score_new_samples``. The RBC of a missing variable is NaN.
    """
    values, ids, _ = _new_rows(model, X)
    z = model.preprocess(values)
    missing = np.isnan(z)
    loadings = model.loadings_
    lam = model.eigenvalues_[: model.n_components_]
    scores = model._scores_of(z)
    estimate = scores @ loadings.T
    if missing.any():
        np.copyto(z, estimate, where=missing)
    residual = np.subtract(z, estimate, out=estimate)  # C~ x
    del z
    c_diag = 1.0 - np.einsum("ja,ja->j", loadings, loadings)
    d_diag = np.einsum("ja,ja->j", loadings, loadings / lam)
    spe = _squared_over(residual, c_diag, c_diag > RBC_DIRECTION_TOL)
    t2 = _squared_over((scores / lam) @ loadings.T, d_diag, d_diag > RBC_DIRECTION_TOL * d_diag.max())
    spe[missing] = np.nan
    t2[missing] = np.nan
    return ReconstructionContributions(
        sample_ids=default_sample_ids(values.shape[0]) if ids is None else list(ids),
        variable_names=list(model.variable_names_),
        spe=spe,
        t2=t2,
    )


def _squared_over(numerator: np.ndarray, denominator: np.ndarray, usable: np.ndarray) -> np.ndarray:
    """numerator**2 / denominator per column, in place; 0 in the columns that are not usable."""
    numerator **= 2
    numerator *= np.where(usable, 1.0 / np.where(usable, denominator, 1.0), 0.0)
    return numerator
