"""Tests for analysis.modelfile: JSON round trip, damaged files, fingerprints."""

import hashlib
import json

import numpy as np
import pandas as pd
import pytest
import rfc8785
from sklearn.datasets import load_wine

import analysis
from analysis.diagnostics import explain_sample
from analysis.errors import InputError
from analysis.modelfile import (
    FORMAT_NAME,
    FORMAT_VERSION,
    ModelFileError,
    fingerprint_scheme,
    load_model,
    model_fingerprint,
    model_from_dict,
    model_to_dict,
    read_model_file,
    save_model,
)
from analysis.pca import PCAModel


@pytest.fixture(scope="module")
def wine():
    # Open dataset shipped by scikit-learn (UCI wine recognition data): 178 samples x 13 variables.
    data = load_wine(as_frame=True).frame.drop(columns="target")
    data.index = [f"w{i}" for i in range(len(data))]
    return data


def _new_samples(data):
    rng = np.random.default_rng(3)
    new = data.iloc[:12] * rng.uniform(0.8, 1.3, size=(12, data.shape[1]))
    new.index = [f"new{i}" for i in range(12)]
    new.iloc[2, 4] = np.nan
    new.iloc[5, [0, 7]] = np.nan
    return new


def _assert_same_behaviour(original, loaded, X):
    # The file must give the same numbers bit for bit: floats are written in their round-trip form.
    np.testing.assert_array_equal(loaded.transform(X), original.transform(X))
    np.testing.assert_array_equal(loaded.hotelling_t2(X), original.hotelling_t2(X))
    np.testing.assert_array_equal(loaded.spe(X), original.spe(X))
    np.testing.assert_array_equal(loaded.reconstruct(X), original.reconstruct(X))
    for confidence in (None, 0.99):
        assert loaded.t2_limit(confidence) == original.t2_limit(confidence)
        assert loaded.t2_limit(confidence, new=True) == original.t2_limit(confidence, new=True)
        for method in ("jackson-mudholkar", "box"):
            assert loaded.spe_limit(confidence, method) == original.spe_limit(confidence, method)
    for i in range(3):
        row = X.iloc[[i]]
        for kind in ("spe", "t2"):
            np.testing.assert_array_equal(loaded.contributions(row, kind), original.contributions(row, kind))


@pytest.mark.parametrize(
    "settings",
    [
        {"n_components": 3, "scaling": "autoscale"},
        {"n_components": 2, "scaling": "pareto", "log10": ["proline", "magnesium"]},
        {"n_components": 4, "scaling": "center", "confidence": 0.99},
        {"n_components": 2, "scaling": "none"},
    ],
)
def test_loaded_model_behaves_exactly_like_the_original(tmp_path, wine, settings):
    original = PCAModel(**settings).fit(wine)
    path = tmp_path / "model.json"
    save_model(original, path, fingerprint="abc", extra={"id_column": "batch"})
    loaded = load_model(path)
    _assert_same_behaviour(original, loaded, wine)
    _assert_same_behaviour(original, loaded, _new_samples(wine))
    assert loaded.variable_names_ == original.variable_names_
    np.testing.assert_array_equal(loaded.eigenvalues_, original.eigenvalues_)
    model, document = read_model_file(path)
    assert document["fingerprint"] == "abc" and document["extra"] == {"id_column": "batch"}
    # The plain-language explanation (which knows the training samples) is unchanged too.
    assert explain_sample(loaded, wine.iloc[[5]], sample_id="w5") == explain_sample(
        original, wine.iloc[[5]], sample_id="w5"
    )


def test_model_fitted_with_missing_values_and_dropped_constant_round_trips(tmp_path, wine):
    data = wine.copy()
    data["constant"] = 1.0
    data.iloc[::9, 2] = np.nan
    original = PCAModel(n_components=3, drop_constant=True).fit(data)
    save_model(original, tmp_path / "m.json")
    loaded = load_model(tmp_path / "m.json")
    assert loaded.dropped_variables_ == ["constant"]
    _assert_same_behaviour(original, loaded, data)
    # Plain arrays in the fitted column layout still work (the dropped column is skipped).
    np.testing.assert_array_equal(loaded.transform(data.to_numpy()), original.transform(data.to_numpy()))


def test_file_is_standard_json_with_format_fields(tmp_path, wine):
    model = PCAModel(n_components=2).fit(wine)
    save_model(model, tmp_path / "m.json")

    def refuse(constant):
        raise AssertionError(f"non-standard JSON constant {constant}")

    # RFC 8259 JSON has no NaN/Infinity; json.loads would accept them unless refused.
    document = json.loads((tmp_path / "m.json").read_text(encoding="utf-8"), parse_constant=refuse)
    assert document["format"] == FORMAT_NAME == "latentdesk-model"
    assert document["version"] == FORMAT_VERSION == 1
    assert np.array(document["loadings"]).shape == (13, 2)
    assert len(document["eigenvalues"]) == 13
    assert set(document["preprocessing"]) >= {"scaling", "log10", "mean", "scale"}
    assert set(document["limits"]) >= {"t2_training", "t2_new", "spe", "confidence"}
    assert document["n_samples"] == 178 and document["n_components"] == 2


@pytest.fixture()
def document(wine):
    return model_to_dict(PCAModel(n_components=2).fit(wine))


def _broken(document, change):
    copy = json.loads(json.dumps(document))
    change(copy)
    return copy


@pytest.mark.parametrize(
    ("change", "message"),
    [
        (lambda d: d.update(version=2), "version 2 is not supported"),
        (lambda d: d.update(format="other"), "not a LatentDesk model"),
        (lambda d: d.pop("loadings"), "missing key 'loadings'"),
        (lambda d: d["loadings"].pop(), "'loadings' must be 13 rows of 2 values"),
        (lambda d: d["loadings"][0].append(0.5), "'loadings' must be 13 rows of 2 values"),
        (lambda d: d["preprocessing"]["mean"].pop(), "'mean' has 12 values, expected 13"),
        (lambda d: d["preprocessing"]["scale"].__setitem__(0, -1.0), "'scale' must be positive"),
        (lambda d: d["loadings"][3].__setitem__(1, "x"), "not a finite number"),
        (lambda d: d.update(n_components="2"), "'n_components' has the wrong type"),
        (lambda d: d["eigenvalues"].__setitem__(12, d["eigenvalues"][12] * 0.5), "changed or damaged"),
        (lambda d: d["eigenvalues"].__setitem__(5, d["eigenvalues"][5] * 1.5), "descending order"),
        (lambda d: d["limits"].update(t2_new=1.0), "does not follow from the stored eigenvalues"),
        (lambda d: d["settings"].update(confidence=1.5), "confidence"),
    ],
)
def test_damaged_documents_are_refused_with_a_clear_message(document, change, message):
    with pytest.raises(ModelFileError, match=message.replace("(", r"\(").replace(")", r"\)")):
        model_from_dict(_broken(document, change))


def test_damaged_files_name_the_file(tmp_path, document):
    path = tmp_path / "model.json"
    text = json.dumps(document)
    path.write_text(text[: len(text) // 2], encoding="utf-8")
    with pytest.raises(ModelFileError, match=r"model file model.json is not valid JSON \(line 1"):
        load_model(path)
    path.write_bytes(b"\xff\xfe\x00junk")
    with pytest.raises(ModelFileError, match="not UTF-8"):
        load_model(path)
    with pytest.raises(ModelFileError, match="model file not found"):
        load_model(tmp_path / "absent.json")
    path.write_text(json.dumps(_broken(document, lambda d: d.update(version=7))), encoding="utf-8")
    with pytest.raises(InputError, match="model file model.json: model format version 7 is not supported"):
        load_model(path)
    assert issubclass(ModelFileError, InputError)


def test_fingerprint_is_sha256_of_canonical_json():
    # docs/design.md section 3: SHA-256 of RFC 8785 canonical JSON of the dataset SHA-256,
    # preprocessing, variable selection, component count, sorted excluded ids and the analysis version.
    # Reference: hashlib (FIPS 180-4 SHA-256) over the rfc8785 package's bytes (RFC 8785, 2020).
    expected_payload = {
        "analysis_version": analysis.__version__,
        "dataset_sha256": "f" * 64,
        "scaling": "autoscale",
        "log10": ["a", "b"],
        "variables": ["c", "a", "b"],
        "n_components": 3,
        "excluded": ["s1", "s2"],
    }
    expected = hashlib.sha256(rfc8785.dumps(expected_payload)).hexdigest()
    got = model_fingerprint("f" * 64, "autoscale", ["b", "a"], ["c", "a", "b"], 3, ["s2", "s1"])
    assert got == expected
    assert model_fingerprint("f" * 64, "autoscale", ["a", "b"], ["c", "a", "b"], 3, ["s1", "s2"]) == expected


def test_fingerprint_of_non_ascii_names_is_rfc8785_not_escaped_text():
    # RFC 8785 section 3.2.2.2: text outside the control characters is written as UTF-8, not \u escapes
    # (which the fingerprint used before, scheme ld-json-ascii-1).
    payload = {
        "analysis_version": analysis.__version__, "dataset_sha256": "e" * 64, "scaling": "autoscale",
        "log10": [], "variables": ["Fe µg/L", "\U0001d4b3 index"], "n_components": 1, "excluded": ["Probe-Ü"],
        "intake": {"roles": {"\U0001f600": "id", "\ufb33": "group"}},
    }
    got = model_fingerprint("e" * 64, "autoscale", [], ["Fe µg/L", "\U0001d4b3 index"], 1, ["Probe-Ü"],
                            intake={"roles": {"\U0001f600": "id", "\ufb33": "group"}})
    assert got == hashlib.sha256(rfc8785.dumps(payload)).hexdigest()
    legacy = json.dumps(payload, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    assert got != hashlib.sha256(legacy.encode("ascii")).hexdigest()


def test_new_files_name_their_scheme_and_files_of_the_older_code_still_load(tmp_path, wine):
    original = PCAModel(n_components=2).fit(wine)
    path = tmp_path / "model.json"
    save_model(original, path, fingerprint="f" * 64)
    document = json.loads(path.read_text(encoding="utf-8"))
    assert document["hash_scheme"] == "rfc8785" and fingerprint_scheme(document) == "rfc8785"
    # The older code wrote the same document without the key (format version 1 throughout).
    del document["hash_scheme"]
    old = tmp_path / "old.json"
    old.write_text(json.dumps(document, indent=1), encoding="utf-8")
    loaded, read_back = read_model_file(old)
    assert fingerprint_scheme(read_back) == "ld-json-ascii-1" and read_back["fingerprint"] == "f" * 64
    _assert_same_behaviour(original, loaded, wine)


def test_an_unknown_hash_scheme_is_refused(tmp_path, wine):
    document = model_to_dict(PCAModel(n_components=2).fit(wine), "f" * 64)
    document["hash_scheme"] = "sorted-keys"
    path = tmp_path / "model.json"
    path.write_text(json.dumps(document), encoding="utf-8")
    with pytest.raises(ModelFileError, match="model file model.json: unknown 'hash_scheme' 'sorted-keys'"):
        load_model(path)


def test_fingerprint_changes_with_every_input(monkeypatch):
    base = ("0" * 64, "autoscale", [], ["a", "b"], 2, [])
    reference = model_fingerprint(*base)
    variants = [
        ("1" * 64, "autoscale", [], ["a", "b"], 2, []),
        ("0" * 64, "pareto", [], ["a", "b"], 2, []),
        ("0" * 64, "autoscale", ["a"], ["a", "b"], 2, []),
        ("0" * 64, "autoscale", [], ["a"], 2, []),
        ("0" * 64, "autoscale", [], ["a", "b"], 1, []),
        ("0" * 64, "autoscale", [], ["a", "b"], 2, ["s9"]),
    ]
    assert len({model_fingerprint(*v) for v in variants} | {reference}) == len(variants) + 1
    assert model_fingerprint(*base, intake={"below_limit": "half"}) != reference
    monkeypatch.setattr(analysis, "__version__", "999.0")
    assert model_fingerprint(*base) != reference


def test_unfitted_model_cannot_be_saved(tmp_path):
    with pytest.raises(InputError, match="not been fitted"):
        save_model(PCAModel(), tmp_path / "m.json")
    assert not (tmp_path / "m.json").exists()


def test_dataframe_columns_are_matched_by_name_after_loading(tmp_path, wine):
    model = PCAModel(n_components=2).fit(wine)
    save_model(model, tmp_path / "m.json")
    shuffled = wine[list(reversed(wine.columns))]
    np.testing.assert_array_equal(load_model(tmp_path / "m.json").transform(shuffled), model.transform(wine))
    assert isinstance(shuffled, pd.DataFrame)


@pytest.mark.parametrize("scaling", ["autoscale", "pareto", "center", "none"])
def test_loaded_model_keeps_the_training_sd(tmp_path, wine, scaling):
    # explain_sample states values in SD units of the training data, so a loaded model needs sd_:
    # the SD with ddof=1 (numpy.std) of each variable after log10, whatever the scaling.
    original = PCAModel(n_components=2, scaling=scaling, log10=["proline"]).fit(wine)
    save_model(original, tmp_path / "m.json")
    loaded = load_model(tmp_path / "m.json")
    expected = wine.to_numpy().std(axis=0, ddof=1)
    expected[list(wine.columns).index("proline")] = np.log10(wine["proline"]).std(ddof=1)
    np.testing.assert_allclose(original.sd_, expected, rtol=1e-12)
    np.testing.assert_array_equal(loaded.sd_, original.sd_)
    row = wine.iloc[[7]]
    assert explain_sample(loaded, row) == explain_sample(original, row)


def test_missing_or_inconsistent_sd_is_refused(document):
    with pytest.raises(ModelFileError, match="missing key preprocessing 'sd'"):
        model_from_dict(_broken(document, lambda d: d["preprocessing"].pop("sd")))
    with pytest.raises(ModelFileError, match="'sd' must be non-negative and agree with 'scale'"):
        model_from_dict(_broken(document, lambda d: d["preprocessing"]["sd"].__setitem__(0, -1.0)))
    # Autoscaled: the divisor is the SD, so a changed SD means a changed file.
    with pytest.raises(ModelFileError, match=r"agree with 'scale' \(autoscale\)"):
        model_from_dict(_broken(document, lambda d: d["preprocessing"]["sd"].__setitem__(3, 2.0)))
