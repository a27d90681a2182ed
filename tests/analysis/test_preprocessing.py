"""Preprocessing: scaling methods, log10, constant variables, missing values.

Scaling definitions: van den Berg, R.A. et al. (2006) Centering, scaling, and transformations:
improving the biological information content of metabolomics data. BMC Genomics 7:142, table 1
(autoscaling: divide by s; Pareto: divide by sqrt(s)); s with ddof=1 (docs/design.md section 2).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from analysis.errors import InputError
from analysis.pca import PCAModel
from analysis.preprocessing import Preprocessor, as_matrix

RNG = np.random.default_rng(8)
X = RNG.lognormal(mean=1.0, sigma=0.5, size=(25, 4))
NAMES = ["a", "b", "c", "d"]
IDS = [f"s{i + 1}" for i in range(25)]


@pytest.mark.parametrize(
    "scaling,divisor",
    [
        ("none", lambda x: np.ones(x.shape[1])),
        ("center", lambda x: np.ones(x.shape[1])),
        ("autoscale", lambda x: x.std(axis=0, ddof=1)),
        ("pareto", lambda x: np.sqrt(x.std(axis=0, ddof=1))),
    ],
)
def test_scaling_methods_match_their_definitions(scaling, divisor):
    # van den Berg et al. (2006), table 1.
    model = PCAModel(n_components=2, scaling=scaling).fit(X)
    centre = np.zeros(4) if scaling == "none" else X.mean(axis=0)
    np.testing.assert_allclose(model.preprocess(X), (X - centre) / divisor(X), rtol=1e-12, atol=1e-14)
    new = RNG.lognormal(size=(3, 4))
    np.testing.assert_allclose(model.preprocess(new), (new - centre) / divisor(X), rtol=1e-12, atol=1e-14)


def test_log10_is_applied_before_centring_and_reapplied_to_new_data():
    # van den Berg et al. (2006): log transformation before scaling.
    model = PCAModel(n_components=2, scaling="autoscale", log10=["b", "d"]).fit(
        pd.DataFrame(X, columns=NAMES, index=IDS)
    )
    L = X.copy()
    L[:, [1, 3]] = np.log10(L[:, [1, 3]])
    expected = (L - L.mean(0)) / L.std(0, ddof=1)
    np.testing.assert_allclose(model.preprocess(pd.DataFrame(X, columns=NAMES)), expected, rtol=1e-12, atol=1e-14)
    np.testing.assert_allclose(model.sd_, L.std(0, ddof=1), rtol=1e-12)


def test_log10_of_non_positive_value_names_variable_sample_and_value():
    bad = pd.DataFrame(X.copy(), columns=NAMES, index=IDS)  # a copy: without copy-on-write (pandas < 3) X would change
    bad.loc["s7", "c"] = -0.5
    with pytest.raises(InputError, match=r"variable 'c', sample 's7' has -0.5"):
        PCAModel(n_components=2, log10=["c"]).fit(bad)
    model = PCAModel(n_components=2, log10=["c"]).fit(pd.DataFrame(X, columns=NAMES, index=IDS))
    zero = pd.DataFrame(X[:2], columns=NAMES, index=["new1", "new2"])
    zero.loc["new2", "c"] = 0.0
    with pytest.raises(InputError, match=r"variable 'c', sample 'new2' has 0"):
        model.transform(zero)


def test_constant_variable_is_named_or_dropped_with_warning():
    data = pd.DataFrame(X, columns=NAMES, index=IDS).assign(flat=3.3, empty=np.nan)
    data.loc["s1", "empty"] = 1.0
    with pytest.raises(InputError, match=r"flat \(constant\).*empty \(fewer than 2 values\)"):
        PCAModel(n_components=2).fit(data)
    model = PCAModel(n_components=2, drop_constant=True).fit(data)
    assert model.dropped_variables_ == ["flat", "empty"]
    assert model.variable_names_ == NAMES
    assert any("flat" in w and "empty" in w for w in model.warnings_)
    # New data may carry the dropped columns or not.
    np.testing.assert_allclose(model.transform(data), model.transform(data[NAMES]))
    np.testing.assert_allclose(model.transform(data.to_numpy()), model.scores_, atol=1e-12)


def test_constant_variable_is_kept_when_scaling_does_not_divide():
    # Centring alone is defined for a constant variable (its centred values are 0): common practice.
    data = np.column_stack([X, np.full(25, 2.0)])
    model = PCAModel(n_components=2, scaling="center").fit(data)
    assert model.variable_names_ == ["x1", "x2", "x3", "x4", "x5"]
    assert abs(model.loadings_[4]).max() < 1e-12
    assert model.variable_explained_[4] == 0.0
    # Asked to drop constants, it goes whatever the scaling.
    dropped = PCAModel(n_components=2, scaling="center", drop_constant=True).fit(data)
    assert dropped.dropped_variables_ == ["x5"] and dropped.warnings_


def test_means_and_sds_ignore_missing_values():
    data = X.copy()
    data[[1, 5, 9], 2] = np.nan
    prep = Preprocessor("autoscale").fit(data, IDS, NAMES)
    np.testing.assert_allclose(prep.mean_, np.nanmean(data, axis=0), rtol=1e-12)
    np.testing.assert_allclose(prep.sd_, np.nanstd(data, axis=0, ddof=1), rtol=1e-12)


def test_bad_scaling_and_names():
    with pytest.raises(InputError, match="scaling='unit'"):
        Preprocessor("unit").fit(X, IDS, NAMES)
    with pytest.raises(InputError, match="duplicate variable name"):
        as_matrix(X, variable_names=["a", "a", "b", "c"])
    with pytest.raises(InputError, match="3 sample ids given for 25 rows"):
        as_matrix(X, sample_ids=["1", "2", "3"])


def test_shifted_cross_product_matches_centred_product():
    # Chan, Golub & LeVeque (1983), The American Statistician 37, 242-247: the shifted-data
    # algorithm gives the centred cross-product; compared with numpy on explicitly centred data.
    # Tiny blocks (step 2) with a first block far from the rest force the exact second pass.
    from analysis.preprocessing import shifted_cross_product

    rng = np.random.default_rng(4)
    data = rng.standard_normal((40_000, 3)) + 50.0
    # With step 2 the first block sits 1000 units above the rest: n d^2 / centred SS = 2e4, so the
    # correction would cancel more than 4 digits and the exact second pass must take over.
    data[:2] += 1e3
    mask = np.array([False, True, False])
    logged = data.copy()
    logged[:, 1] = np.log10(logged[:, 1])
    centred = logged - logged.mean(0)
    for step in (2, 512, 10_000):
        mean, sd, n_obs, cross = shifted_cross_product(data, mask, step)
        np.testing.assert_allclose(mean, logged.mean(0), rtol=1e-12)
        np.testing.assert_allclose(cross, centred.T @ centred, rtol=1e-9)
        np.testing.assert_allclose(sd, logged.std(0, ddof=1), rtol=1e-10)
        assert list(n_obs) == [40_000] * 3
