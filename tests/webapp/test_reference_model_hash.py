"""The SHA-256 of a frozen reference-model file under the scheme the file names, old files included.

New files name RFC 8785 (Rundgren, Jordan & Erdtman 2020) in ``hash_scheme``; their hash is
recomputed here with the ``rfc8785`` package and hashlib (FIPS 180-4) directly.  Files frozen by
the older code carry no ``hash_scheme`` and were hashed over
``json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=True)`` (scheme
``ld-json-ascii-1``), written out here.  The stored part runs on SQLite and PostgreSQL.
"""

from __future__ import annotations

import hashlib
import json

import pandas as pd
import pytest
import rfc8785
from sklearn.datasets import load_wine

from analysis.modelfile import model_from_dict, model_to_dict
from analysis.pca import PCAModel
from webapp.services import audit, reference_models
from webapp.store import accounts, datasets, session_scope
from webapp.store import reference_models as store


def _old_hash(document) -> str:
    text = json.dumps(document, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(text.encode("ascii")).hexdigest()


@pytest.fixture(scope="module")
def document():
    # Open dataset shipped by scikit-learn (UCI wine recognition data), two columns renamed to non-ASCII.
    data = load_wine(as_frame=True).frame.drop(columns="target").iloc[:, :5]
    data.columns = ["Alkohol %", "Äpfelsäure g/L", "ash", "alcalinity", "Mg mg/L \U0001d4b3"]
    data.index = pd.Index([f"W-{i:03d}" for i in range(len(data))])
    model = PCAModel(n_components=2).fit(data)
    return model_to_dict(model, "f" * 64, {"note": "Grün", "tiny": 1e-7, "big": 1e16})


def test_a_new_file_is_hashed_under_rfc8785(document):
    assert document["hash_scheme"] == "rfc8785"
    assert reference_models.document_sha256(document) == hashlib.sha256(rfc8785.dumps(document)).hexdigest()
    assert reference_models.document_sha256(document) != _old_hash(document)


def test_a_file_of_the_older_code_is_hashed_as_it_was_then(document):
    old = {k: v for k, v in document.items() if k != "hash_scheme"}
    assert reference_models.document_sha256(old) == _old_hash(old)
    assert reference_models.document_sha256(old) != hashlib.sha256(rfc8785.dumps(old)).hexdigest()


def test_an_approved_model_frozen_by_the_older_code_is_still_handed_out(app_factory, database_url, document):
    old = {k: v for k, v in document.items() if k != "hash_scheme"}
    app = app_factory(DATABASE_URL=database_url)
    with app.app_context():
        with session_scope() as s:
            ana = accounts.add_user(s, "ana", "analyst", "x", "Ana Analyst")
            rita = accounts.add_user(s, "rita", "reviewer", "x", "Rita Reviewer")
            dataset = datasets.insert_dataset(
                s, sha256="a" * 64, name="d.csv", stored_path="aa/none", size_bytes=0, id_column=None,
                sheet=None, intake_options={}, n_samples=0, n_variables=0, variables=[], metadata_columns=[],
                warnings=[], report={}, uploaded_by=ana.id,
            )
            model = datasets.record_model(s, dataset_id=dataset.id, fingerprint="f" * 64, settings={}, summary={},
                                          created_by=ana.id)
            row = store.insert_reference_model(
                s, name="Line 2", version=1, note="", state="proposed", dataset_id=dataset.id, model_id=model.id,
                fingerprint="f" * 64, training_sha256="a" * 64, warning_confidence=0.95, action_confidence=0.99,
                variables=[], limits={}, training={"n_samples": 178}, document=old, document_sha256=_old_hash(old),
                proposed_by=ana.id, created_at=audit.now_utc(),
            )
            store.insert_signature(s, reference_model_id=row.id, step="decision", signer_id=rita.id,
                                   printed_name="Rita Reviewer", meaning="approved", comment="",
                                   signed_at=audit.now_utc())
            assert store.decide(s, row.id, "approved", audit.now_utc())
            reference_model_id = row.id
        assert reference_models.model_document(reference_model_id) == old
        frozen, info = reference_models.frozen_model(reference_model_id)
    assert frozen.variable_names_ == model_from_dict(old).variable_names_ and info["state"] == "approved"
