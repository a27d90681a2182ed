"""Hotelling's T2, SPE (Q residual), their confidence limits and contributions.

Pure functions on arrays, plus ``explain_sample`` which turns the
contributions of one sample into a ranked plain-language explanation.

References
----------
Tracy, N.D., Young, J.C., Mason, R.L. (1992) Multivariate control charts for
    individual observations. Journal of Quality Technology 24(2), 88-95.
Jackson, J.E., Mudholkar, G.S. (1979) Control procedures for residuals
    associated with principal component analysis. Technometrics 21(3), 341-349.
Box, G.E.P. (1954) Some theorems on quadratic forms applied in the study of
    analysis of variance problems I. Annals of Mathematical Statistics 25, 290-302.
Nomikos, P., MacGregor, J.F. (1995) Multivariate SPC charts for monitoring
    batch processes. Technometrics 37(1), 41-59.
Westerhuis, J.A., Gurden, S.P., Smilde, A.K. (2000) Generalized contribution
    plots in multivariate statistical process monitoring. Chemometrics and
    Intelligent Laboratory Systems 51, 95-114.
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from analysis.errors import InputError

SPE_METHODS = ("jackson-mudholkar", "box")


def check_confidence(confidence: float) -> float:
    """Return ``confidence`` as float, or raise InputError unless 0 < confidence < 1."""
    try:
        value = float(confidence)
    except (TypeError, ValueError) as exc:
        raise InputError(f"confidence={confidence!r} is not a number") from exc
    if not 0.0 < value < 1.0:
        raise InputError(f"confidence={confidence!r} must lie strictly between 0 and 1 (e.g. 0.95)")
    return value


def hotelling_t2(scores: np.ndarray, eigenvalues: np.ndarray) -> np.ndarray:
    """T2 = sum_a t_a^2 / lambda_a over the A columns of ``scores`` (m, A) -> (m,)."""
    scores = np.atleast_2d(scores)
    lam = np.asarray(eigenvalues, dtype=float)[: scores.shape[1]]
    return np.einsum("ia,ia->i", scores, scores / lam)


def t2_limit(n: int, n_components: int, confidence: float, new: bool = False) -> float:
    """Upper confidence limit of Hotelling's T2 for a model of ``n`` training samples.

    Training samples (``new=False``), Tracy, Young & Mason (1992):
        T2 ~ ((n-1)^2 / n) Beta(A/2, (n-A-1)/2).
    New samples (``new=True``), same paper; NIST/SEMATECH e-Handbook 6.5.4.3:
        T2 ~ A (n+1)(n-1) / (n (n-A)) F(A, n-A).
    """
    confidence = check_confidence(confidence)
    n, a = int(n), int(n_components)
    if a < 1:
        raise InputError(f"the T2 limit needs at least one component, got {a}")
    if new:
        if n - a < 1:
            raise InputError(f"the new-sample T2 limit needs more samples than components (n={n}, A={a})")
        return float(a * (n + 1) * (n - 1) / (n * (n - a)) * stats.f.ppf(confidence, a, n - a))
    if n - a - 1 < 1:
        raise InputError(
            f"the training T2 limit needs at least A+2 samples (n={n}, A={a}); use fewer components"
        )
    return float((n - 1) ** 2 / n * stats.beta.ppf(confidence, a / 2, (n - a - 1) / 2))


def spe_limit(discarded_eigenvalues, confidence: float, method: str = "jackson-mudholkar") -> float:
    """Upper confidence limit of SPE from the eigenvalues of the discarded components.

    theta_i = sum of discarded lambda^i (i = 1, 2, 3).

    ``jackson-mudholkar`` (Jackson & Mudholkar 1979):
        h0 = 1 - 2 theta1 theta3 / (3 theta2^2)
        Q = theta1 [c sqrt(2 theta2 h0^2) / theta1 + 1 + theta2 h0 (h0 - 1) / theta1^2]^(1/h0)
      with c the standard normal quantile. The normal approximation of
      (Q/theta1)^h0 needs h0 > 0; in the rare case h0 <= 0 (one discarded
      eigenvalue dominating very many small ones) the Box limit is returned.
    ``box`` (Box 1954; Nomikos & MacGregor 1995): Q ~ g chi2(h), g = theta2/theta1,
        h = theta1^2 / theta2.

    When nothing is discarded (all the components the data allow are in the
    model) the training data are reproduced exactly, every training SPE is 0,
    and the limit is 0: any new sample off the model plane is flagged.
    """
    confidence = check_confidence(confidence)
    if method not in SPE_METHODS:
        raise InputError(f"SPE limit method={method!r} is not one of {', '.join(SPE_METHODS)}")
    lam = np.clip(np.asarray(discarded_eigenvalues, dtype=float), 0.0, None)
    theta1, theta2, theta3 = (float(np.sum(lam**i)) for i in (1, 2, 3))
    if theta1 <= 0.0 or theta2 <= 0.0:
        return 0.0
    h0 = 1.0 - 2.0 * theta1 * theta3 / (3.0 * theta2**2)
    if method == "box" or h0 <= 0.0:
        g, h = theta2 / theta1, theta1**2 / theta2
        return float(g * stats.chi2.ppf(confidence, h))
    c = stats.norm.ppf(confidence)
    base = c * np.sqrt(2.0 * theta2 * h0**2) / theta1 + 1.0 + theta2 * h0 * (h0 - 1.0) / theta1**2
    return float(theta1 * base ** (1.0 / h0))


def t2_contributions(z: np.ndarray, loadings: np.ndarray, eigenvalues: np.ndarray) -> np.ndarray:
    """Per-variable contributions to T2 (Westerhuis, Gurden & Smilde 2000, eq. for T2).

    c_j = sum_a (t_a / lambda_a) p_ja z_j with t = P'z; they sum to T2 over j.
    ``z`` is one preprocessed, complete row (p,) or several (m, p).
    """
    z = np.asarray(z, dtype=float)
    lam = np.asarray(eigenvalues, dtype=float)[: loadings.shape[1]]
    t = z @ loadings
    return z * ((t / lam) @ loadings.T)


def spe_contributions(residuals: np.ndarray) -> np.ndarray:
    """Per-variable contributions to SPE: squared residuals (0 where missing); they sum to SPE."""
    r = np.asarray(residuals, dtype=float)
    return np.where(np.isnan(r), 0.0, r * r)


def explain_sample(model, x, sample_id=None, top: int = 3) -> dict:
    """Ranked plain-language explanation of why one sample lies where it does.

    ``x`` is one raw row (as given to ``model.transform``). When ``sample_id``
    is one of the model's training samples the training T2 limit is used,
    otherwise the new-sample limit. The statistic that exceeds its limit by
    the larger ratio decides which contributions are explained (T2: position
    within the model, Westerhuis et al. 2000; SPE: distance from the model).

    Returns a dict with "sentence", "t2", "spe", "t2_limit", "spe_limit",
    "driver" ("t2" or "spe"), and "variables": one dict per variable ranked by
    the absolute contribution to the driving statistic, with keys variable,
    spe_contribution, t2_contribution, residual, standardized_value (SD of
    the training data from the training mean; after log10 where chosen).
    """
    row = model._one_row(x)
    is_training = sample_id is not None and str(sample_id) in set(model.sample_ids_)
    z = model.preprocess(row)[0]
    z_full, residual = model._filled_row(z)
    t2 = float(hotelling_t2(z_full @ model.loadings_, model.eigenvalues_)[0])
    spe_c = spe_contributions(residual)
    spe = float(spe_c.sum())
    t2_c = t2_contributions(z_full, model.loadings_, model.eigenvalues_)
    t2_lim = model.t2_limit(new=not is_training)
    spe_lim = model.spe_limit()
    # Standardised value in SD units of the training data; residual in the same units.
    to_sd = model.scale_ / model.sd_
    standardized = z * to_sd
    residual_sd = residual * to_sd

    t2_ratio = t2 / t2_lim
    spe_ratio = spe / spe_lim if spe_lim > 0 else (np.inf if spe > 0 else 0.0)
    driver = "spe" if spe_ratio > t2_ratio else "t2"
    drive = spe_c if driver == "spe" else t2_c
    order = np.argsort(-np.abs(drive), kind="stable")
    names = model.variable_names_
    variables = [
        {
            "variable": names[j],
            "spe_contribution": float(spe_c[j]),
            "t2_contribution": float(t2_c[j]),
            "residual": None if np.isnan(residual[j]) else float(residual[j]),
            "standardized_value": None if np.isnan(standardized[j]) else float(standardized[j]),
        }
        for j in order
    ]

    def phrase(j: int) -> str:
        if driver == "spe":
            r = residual_sd[j]
            return f"{names[j]}, {abs(r):.1f} SD {'higher' if r > 0 else 'lower'} than the model predicts"
        s = standardized[j]
        if np.isnan(s):
            return f"{names[j]} (missing, estimated by the model)"
        return f"{names[j]}, {abs(s):.1f} SD {'above' if s > 0 else 'below'} the mean"

    chosen = [j for j in order if drive[j] > 0][: max(int(top), 1)]
    reasons = "; ".join(phrase(j) for j in chosen)
    level = f"{model.confidence:.0%}"
    t2_text = f"T² {t2:.3g}, {level} limit {t2_lim:.3g}"
    spe_text = f"SPE {spe:.3g}, {level} limit {spe_lim:.3g}"
    if t2 > t2_lim or spe > spe_lim:
        if driver == "t2":
            head = f"Far out within the model ({t2_text}) mainly because of "
        else:
            head = f"Poorly described by the model ({spe_text}) mainly because of "
        sentence = head + (reasons or "no single variable") + "."
    else:
        sentence = f"Within both limits ({t2_text}; {spe_text})."
        if reasons:
            sentence += f" Largest deviations: {reasons}."
    return {
        "sentence": sentence,
        "t2": t2,
        "spe": spe,
        "t2_limit": t2_lim,
        "spe_limit": spe_lim,
        "driver": driver,
        "variables": variables,
    }
