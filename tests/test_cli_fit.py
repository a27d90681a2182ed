"""`latentdesk fit` and `latentdesk apply` end to end: files, columns, values, exit codes."""

import hashlib
import json
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_wine
from sklearn.decomposition import PCA

from analysis.modelfile import model_fingerprint
from webapp import cli

FIT_FILES = {"summary.json", "scores.csv", "loadings.csv", "samples.csv", "model.json"}
SUMMARY_KEYS = {
    "n_samples", "n_variables", "n_components", "scaling", "explained_variance_ratio", "cumulative",
    "eigenvalues", "confidence", "t2_limit", "spe_limit", "excluded", "warnings", "fingerprint",
    "below_limit_policy",
}


@pytest.fixture(scope="module")
def wine_frame():
    # Open dataset shipped by scikit-learn (UCI wine recognition data), 178 samples x 13 variables, with an id
    # column, a numeric grouping column (the cultivar) and a text column added.
    wine = load_wine(as_frame=True).frame
    frame = wine.drop(columns="target")
    frame.insert(0, "lot", [f"L{i:03d}" for i in range(len(frame))])
    frame.insert(1, "cultivar", wine["target"].to_numpy())
    frame.insert(2, "note", ["=HYPERLINK(\"x\")" if i == 0 else ("-dark" if i == 1 else "ok") for i in range(len(frame))])
    return frame


@pytest.fixture()
def wine_csv(tmp_path, wine_frame):
    path = tmp_path / "wine.csv"
    wine_frame.to_csv(path, index=False)
    return path


def _run(argv, capsys):
    """Call the command in-process; return (exit code, stdout, stderr)."""
    try:
        code = cli.main([str(a) for a in argv])
    except SystemExit as exc:  # argument errors from argparse
        code = exc.code
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _autoscaled(frame):
    values = frame.to_numpy(dtype=float)
    return (values - values.mean(axis=0)) / values.std(axis=0, ddof=1)


def test_fit_writes_exactly_the_contract_files(tmp_path, wine_csv, wine_frame, capsys):
    out = tmp_path / "out"
    code, stdout, stderr = _run(
        ["fit", wine_csv, "--id-column", "lot", "--group-column", "cultivar", "--components", "3", "--out", out],
        capsys,
    )
    assert code == 0, stderr
    assert "fitted 3 component(s) on 178 samples x 13 variables" in stdout
    assert {p.name for p in out.iterdir()} == FIT_FILES

    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert SUMMARY_KEYS <= set(summary)
    assert summary["n_samples"] == 178 and summary["n_variables"] == 13 and summary["n_components"] == 3
    assert summary["excluded"] == [] and summary["scaling"] == "autoscale" and summary["confidence"] == 0.95
    assert len(summary["eigenvalues"]) == 13 and "rank" not in summary

    variables = [c for c in wine_frame.columns if c not in ("lot", "cultivar", "note")]
    # scikit-learn's PCA on the same autoscaled data (Pedregosa et al. 2011, sklearn.decomposition.PCA).
    reference = PCA(n_components=3, svd_solver="full").fit(_autoscaled(wine_frame[variables]))
    np.testing.assert_allclose(summary["explained_variance_ratio"], reference.explained_variance_ratio_, rtol=1e-10)
    np.testing.assert_allclose(summary["eigenvalues"][:3], reference.explained_variance_, rtol=1e-10)

    scores = pd.read_csv(out / "scores.csv")
    assert list(scores.columns) == ["sample", "PC1", "PC2", "PC3"]
    assert list(scores["sample"]) == list(wine_frame["lot"])
    expected = reference.transform(_autoscaled(wine_frame[variables]))
    signs = np.sign(np.sum(expected * scores[["PC1", "PC2", "PC3"]].to_numpy(), axis=0))
    np.testing.assert_allclose(scores[["PC1", "PC2", "PC3"]].to_numpy(), expected * signs, rtol=1e-8, atol=1e-10)

    loadings = pd.read_csv(out / "loadings.csv")
    assert list(loadings.columns) == ["variable", "PC1", "PC2", "PC3"]
    assert list(loadings["variable"]) == variables

    samples = pd.read_csv(out / "samples.csv", keep_default_na=False)
    assert list(samples.columns) == ["sample", "cultivar", "note", "t2", "spe", "t2_exceeds", "spe_exceeds"]
    # T2 = sum of t_a^2 / lambda_a (Hotelling 1931; MacGregor & Kourti 1995), from scikit-learn's scores.
    t2 = np.sum(expected**2 / reference.explained_variance_, axis=1)
    np.testing.assert_allclose(samples["t2"], t2, rtol=1e-8)
    assert (samples["t2_exceeds"] == (samples["t2"] > summary["t2_limit"])).all()
    assert (samples["spe_exceeds"] == (samples["spe"] > summary["spe_limit"])).all()
    # OWASP CSV injection guidance: text cells starting with = + - @ get a leading quote; numbers stay numbers.
    assert samples.loc[0, "note"] == "'=HYPERLINK(\"x\")"
    assert samples.loc[1, "note"] == "'-dark"
    assert (scores["PC1"] < 0).any() and pd.api.types.is_float_dtype(scores["PC1"])

    model = json.loads((out / "model.json").read_text(encoding="utf-8"))
    assert model["format"] == "latentdesk-model" and model["version"] == 1
    assert model["fingerprint"] == summary["fingerprint"]


def test_fingerprint_follows_design_and_is_stable(tmp_path, wine_csv, capsys):
    first, second = tmp_path / "a", tmp_path / "b"
    for out in (first, second):
        assert _run(["fit", wine_csv, "--components", "2", "--exclude", "L005,L001", "--out", out], capsys)[0] == 0
    summary = json.loads((first / "summary.json").read_text(encoding="utf-8"))
    again = json.loads((second / "summary.json").read_text(encoding="utf-8"))
    assert summary["fingerprint"] == again["fingerprint"]
    # docs/design.md section 3: the dataset is known by the SHA-256 of its raw bytes (hashlib, FIPS 180-4).
    sha = hashlib.sha256(wine_csv.read_bytes()).hexdigest()
    assert summary["dataset"]["sha256"] == sha
    # Without --group-column the numeric cultivar column is a variable of the file, so it is hashed too.
    variables = ["cultivar"] + list(load_wine().feature_names)
    expected = model_fingerprint(sha, "autoscale", [], variables, 2, ["L001", "L005"])
    assert summary["fingerprint"] == expected
    assert summary["excluded"] == ["L001", "L005"] and summary["n_samples"] == 176
    scores = pd.read_csv(first / "scores.csv")
    assert "L001" not in set(scores["sample"]) and len(scores) == 176


def test_components_auto_uses_the_recommendation(tmp_path, wine_csv, capsys):
    out = tmp_path / "auto"
    code, _, stderr = _run(["fit", wine_csv, "--id-column", "lot", "--group-column", "cultivar", "--out", out], capsys)
    assert code == 0, stderr
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert summary["components_requested"] == "auto"
    assert summary["n_components"] == summary["recommended_components"] == summary["rank"]["recommended"]
    assert "cross-validation" in summary["component_rule"]
    table = pd.DataFrame(summary["rank"]["table"])
    assert list(table.columns) == [
        "components", "eigenvalue", "explained", "cumulative", "cv_explained", "parallel_threshold", "broken_stick",
    ]
    # The rank table's eigenvalues are the model's (same data, same preprocessing).
    np.testing.assert_allclose(table["eigenvalue"], summary["eigenvalues"][: len(table)], rtol=1e-9)
    assert len(pd.read_csv(out / "scores.csv").columns) == 1 + summary["n_components"]


def test_apply_on_the_training_file_gives_the_training_scores(tmp_path, wine_csv, capsys):
    fitted, applied = tmp_path / "fit", tmp_path / "apply"
    assert _run(["fit", wine_csv, "--id-column", "lot", "--group-column", "cultivar", "--components", "4",
                 "--out", fitted], capsys)[0] == 0
    code, stdout, stderr = _run(["apply", fitted / "model.json", wine_csv, "--out", applied], capsys)
    assert code == 0, stderr
    assert "scored 178 new sample(s)" in stdout
    assert {p.name for p in applied.iterdir()} == {"samples.csv"}
    scores = pd.read_csv(fitted / "scores.csv")
    training = pd.read_csv(fitted / "samples.csv")
    samples = pd.read_csv(applied / "samples.csv")
    # The id and group columns stored at fit are used again: cultivar is metadata, not an extra variable.
    assert list(samples.columns) == [
        "sample", "cultivar", "note", "PC1", "PC2", "PC3", "PC4", "t2", "spe", "t2_exceeds", "spe_exceeds",
    ]
    assert stderr == ""
    np.testing.assert_allclose(samples[["PC1", "PC2", "PC3", "PC4"]], scores[["PC1", "PC2", "PC3", "PC4"]],
                               rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(samples["t2"], training["t2"], rtol=1e-12)
    np.testing.assert_allclose(samples["spe"], training["spe"], rtol=1e-10, atol=1e-14)
    # New samples are judged against the new-sample limit (F distribution, Tracy, Young & Mason 1992).
    summary = json.loads((fitted / "summary.json").read_text(encoding="utf-8"))
    assert summary["t2_limit_new"] > summary["t2_limit"]
    assert (samples["t2_exceeds"] == (samples["t2"] > summary["t2_limit_new"])).all()


def test_apply_scores_a_single_new_sample(tmp_path, wine_csv, capsys):
    # One new batch is a normal monitoring case (common practice): no minimum of 3 samples, no
    # "constant variable" warnings for a one-row file.
    fitted, applied, one = tmp_path / "fit", tmp_path / "apply", tmp_path / "one.csv"
    assert _run(["fit", wine_csv, "--id-column", "lot", "--group-column", "cultivar", "--components", "3",
                 "--out", fitted], capsys)[0] == 0
    lines = open(wine_csv, encoding="utf-8").read().splitlines()
    one.write_text("\n".join(lines[:2]) + "\n", encoding="utf-8")
    code, stdout, stderr = _run(["apply", fitted / "model.json", one, "--out", applied], capsys)
    assert code == 0, stderr
    assert "scored 1 new sample(s)" in stdout and stderr == ""
    training = pd.read_csv(fitted / "samples.csv").iloc[[0]].reset_index(drop=True)
    sample = pd.read_csv(applied / "samples.csv")
    np.testing.assert_allclose(sample[["t2", "spe"]], training[["t2", "spe"]], rtol=1e-10)


def test_apply_does_not_warn_about_a_variable_with_one_value_in_the_batch(tmp_path, wine_frame, capsys):
    # A batch may hold one value per variable (e.g. the same lot of reagent): the model's own
    # centring and scaling apply, so "constant; cannot be autoscaled" would be false (common practice).
    train, new_path, fitted = tmp_path / "train.csv", tmp_path / "batch.csv", tmp_path / "fit"
    wine_frame.to_csv(train, index=False)
    assert _run(["fit", train, "--id-column", "lot", "--group-column", "cultivar", "--components", "3",
                 "--out", fitted], capsys)[0] == 0
    batch = wine_frame.iloc[10:16].copy()
    for column in ("ash", "hue", "proline", "magnesium"):
        batch[column] = batch[column].iloc[0]
    batch.to_csv(new_path, index=False)
    code, _, stderr = _run(["apply", fitted / "model.json", new_path, "--out", tmp_path / "applied"], capsys)
    assert code == 0 and stderr == "", stderr


def test_apply_matches_variables_by_name_and_warns_about_extra_ones(tmp_path, wine_frame, capsys):
    train = tmp_path / "train.csv"
    wine_frame.to_csv(train, index=False)
    fitted = tmp_path / "fit"
    assert _run(["fit", train, "--id-column", "lot", "--group-column", "cultivar", "--components", "2",
                 "--out", fitted], capsys)[0] == 0
    new = wine_frame.iloc[:5].copy()
    new = new[list(reversed(new.columns))]
    new["humidity"] = np.linspace(1.0, 2.0, 5)
    new_path = tmp_path / "new.csv"
    new.to_csv(new_path, index=False)
    code, _, stderr = _run(["apply", fitted / "model.json", new_path, "--out", tmp_path / "applied"], capsys)
    assert code == 0
    assert stderr.strip() == "latentdesk: warning: new.csv: variable(s) not in the model were ignored: 'humidity'"
    applied = pd.read_csv(tmp_path / "applied" / "samples.csv")
    np.testing.assert_allclose(applied[["PC1", "PC2"]], pd.read_csv(fitted / "scores.csv")[["PC1", "PC2"]][:5],
                               rtol=1e-12, atol=1e-12)

    missing = wine_frame.iloc[:5].drop(columns=["proline"])
    missing.to_csv(new_path, index=False)
    code, _, stderr = _run(["apply", fitted / "model.json", new_path, "--out", tmp_path / "x"], capsys)
    assert code == 2
    assert stderr == "latentdesk: error: new.csv: variable(s) the model needs are missing: 'proline'\n"
    assert not (tmp_path / "x").exists()


@pytest.mark.parametrize(
    ("options", "message"),
    [
        (["--exclude", "L001,NOPE"], "unknown sample id(s) to exclude: NOPE"),
        (["--components", "0"], "components must be 'auto' or a whole number of at least 1, got '0'"),
        (["--components", "2.5"], "components must be 'auto' or a whole number of at least 1, got '2.5'"),
        (["--components", "40"], "n_components=40 exceeds"),
        (["--log10", "colour"], "log10 names column(s) that are not variables of the data: 'colour'"),
        (["--log10", "note"], "log10 names column(s) that are not variables of the data: 'note'"),
        (["--log10", "alcalinity_of_ash", "--scaling", "center", "--components", "1"], None),
        (["--confidence", "1.5"], "confidence=1.5 must lie strictly between 0 and 1"),
        (["--confidence", "abc"], "argument --confidence: invalid float value: 'abc'"),
        (["--scaling", "unit"], "argument --scaling: invalid choice: 'unit'"),
        (["--id-column", "nowhere"], "no column named 'nowhere'"),
    ],
)
def test_bad_fit_input_is_one_line_and_exit_2(tmp_path, wine_csv, capsys, options, message):
    out = tmp_path / "out"
    code, stdout, stderr = _run(["fit", wine_csv, *options, "--out", out], capsys)
    if message is None:  # a valid combination, as a control
        assert code == 0, stderr
        return
    assert code == 2
    assert stderr.startswith("latentdesk: error: ") and stderr.count("\n") == 1, stderr
    assert message in stderr
    assert "Traceback" not in stderr and stdout == ""
    assert not out.exists()


def test_bad_files_and_models_exit_2(tmp_path, wine_csv, capsys):
    code, _, stderr = _run(["fit", tmp_path / "absent.csv", "--out", tmp_path / "o"], capsys)
    assert code == 2 and "absent.csv" in stderr and stderr.count("\n") == 1
    damaged = tmp_path / "model.json"
    damaged.write_text('{"format": "latentdesk-model", "version": 1, "loadings": [', encoding="utf-8")
    code, _, stderr = _run(["apply", damaged, wine_csv, "--out", tmp_path / "o"], capsys)
    assert code == 2 and "model file model.json is not valid JSON" in stderr and stderr.count("\n") == 1
    damaged.write_text('{"format": "latentdesk-model", "version": 99}', encoding="utf-8")
    code, _, stderr = _run(["apply", damaged, wine_csv, "--out", tmp_path / "o"], capsys)
    assert code == 2 and "version 99 is not supported" in stderr
    code, _, stderr = _run(["fit", wine_csv], capsys)
    assert code == 2 and "--out" in stderr and stderr.count("\n") == 1
    assert not (tmp_path / "o").exists()


def test_constant_variable_is_refused_or_dropped_on_request(tmp_path, wine_frame, capsys):
    frame = wine_frame.copy()
    frame["batch_size"] = 10.0
    path = tmp_path / "const.csv"
    frame.to_csv(path, index=False)
    code, _, stderr = _run(["fit", path, "--out", tmp_path / "o"], capsys)
    assert code == 2 and "batch_size (constant)" in stderr
    code, _, stderr = _run(["fit", path, "--drop-constant", "--components", "2", "--out", tmp_path / "o"], capsys)
    assert code == 0 and "batch_size" in stderr and stderr.startswith("latentdesk: warning: ")
    summary = json.loads((tmp_path / "o" / "summary.json").read_text(encoding="utf-8"))
    assert summary["dropped_variables"] == ["batch_size"]


def test_internal_error_is_exit_1_with_one_line(tmp_path, wine_csv, capsys, monkeypatch):
    import webapp.services.headless as headless

    def broken(*args, **kwargs):
        raise RuntimeError("boom")

    monkeypatch.setattr(headless, "fit_to_folder", broken)
    code, _, stderr = _run(["fit", wine_csv, "--out", tmp_path / "o"], capsys)
    assert code == 1 and stderr == "latentdesk: internal error: RuntimeError: boom\n"


def test_console_command_end_to_end(tmp_path, wine_csv):
    """The real process: exit codes and stderr as a shell sees them."""
    out = tmp_path / "out"
    command = [sys.executable, "-m", "webapp.cli"]
    done = subprocess.run(
        [*command, "fit", str(wine_csv), "--id-column", "lot", "--components", "2", "--out", str(out)],
        capture_output=True, text=True, timeout=300,
    )
    assert done.returncode == 0, done.stderr
    assert {p.name for p in out.iterdir()} == FIT_FILES
    applied = subprocess.run(
        [*command, "apply", str(out / "model.json"), str(wine_csv), "--out", str(tmp_path / "new")],
        capture_output=True, text=True, timeout=300,
    )
    assert applied.returncode == 0, applied.stderr
    scores = pd.read_csv(out / "scores.csv")
    samples = pd.read_csv(tmp_path / "new" / "samples.csv")
    np.testing.assert_allclose(samples[["PC1", "PC2"]], scores[["PC1", "PC2"]], rtol=1e-12, atol=1e-12)
    bad = subprocess.run(
        [*command, "fit", str(wine_csv), "--exclude", "ghost", "--out", str(tmp_path / "bad")],
        capture_output=True, text=True, timeout=300,
    )
    assert bad.returncode == 2
    assert bad.stderr == "latentdesk: error: unknown sample id(s) to exclude: ghost\n"
    assert not (tmp_path / "bad").exists()


def test_missing_cells_fit_and_apply(tmp_path, wine_frame, capsys):
    frame = wine_frame.copy()
    rng = np.random.default_rng(4)
    variables = list(load_wine().feature_names)
    holes = rng.random((len(frame), len(variables))) < 0.05
    values = frame[variables].to_numpy(dtype=float, copy=True)
    values[holes] = np.nan
    frame[variables] = values
    path = tmp_path / "holes.csv"
    frame.to_csv(path, index=False)
    fitted, applied = tmp_path / "fit", tmp_path / "apply"
    code, _, stderr = _run(["fit", path, "--id-column", "lot", "--group-column", "cultivar", "--out", fitted], capsys)
    assert code == 0, stderr
    summary = json.loads((fitted / "summary.json").read_text(encoding="utf-8"))
    assert summary["n_missing"] == int(holes.sum()) and summary["solver"].startswith("imputation")
    assert all(row["cv_explained"] is not None for row in summary["rank"]["table"][:2])
    assert _run(["apply", fitted / "model.json", path, "--out", applied], capsys)[0] == 0
    samples = pd.read_csv(applied / "samples.csv")
    scores = pd.read_csv(fitted / "scores.csv")
    names = [f"PC{a + 1}" for a in range(summary["n_components"])]
    complete = ~holes.any(axis=1)
    # Complete rows get their training scores back; incomplete rows are scored by projection to the model plane
    # (Nelson, Taylor & MacGregor 1996), so they are finite but need not equal the imputed training scores.
    np.testing.assert_allclose(samples.loc[complete, names], scores.loc[complete, names], rtol=1e-9, atol=1e-9)
    assert np.isfinite(samples[names + ["t2", "spe"]].to_numpy()).all()


def test_output_folder_that_is_a_file_is_bad_input(tmp_path, wine_csv, capsys):
    blocker = tmp_path / "taken"
    blocker.write_text("not a folder", encoding="utf-8")
    code, _, stderr = _run(["fit", wine_csv, "--components", "2", "--out", blocker], capsys)
    assert code == 2 and stderr == f"latentdesk: error: output folder {blocker} exists and is not a folder\n"
    assert blocker.read_text(encoding="utf-8") == "not a folder"
