"""Provenance records: hashes, sidecars, lineage (references: hashlib sha256, RFC 8259 JSON)."""

from __future__ import annotations

import hashlib
import json
import os

import pytest

from glmsteps import provenance as prov
from glmsteps.errors import ProvenanceError


def test_params_hash_is_sha256_of_sorted_compact_json():
    params = {"b": [1, 2.5], "a": {"y": True, "x": None}, "c": "é"}
    # reference: hashlib sha256 of json.dumps with sorted keys and no spaces, written independently
    expected = hashlib.sha256(json.dumps(params, sort_keys=True, separators=(",", ":"),
                                         ensure_ascii=False).encode()).hexdigest()
    assert prov.hash_params(params) == expected
    assert prov.hash_params({"c": "é", "a": {"x": None, "y": True}, "b": [1, 2.5]}) == expected


def test_non_finite_param_is_refused():
    with pytest.raises(ProvenanceError, match="not finite"):
        prov.hash_params({"x": float("nan")})


def test_file_hash_matches_hashlib(tmp_path):
    path = tmp_path / "blob.bin"
    data = os.urandom(3 * 1024 * 1024 + 17)
    path.write_bytes(data)
    assert prov.hash_file(path) == hashlib.sha256(data).hexdigest()  # reference: hashlib


def test_sidecar_names():
    assert str(prov.sidecar_path("a/b/z.nii.gz")) == "a/b/z.json"
    assert str(prov.sidecar_path("fit.h5")) == "fit.json"
    assert str(prov.sidecar_path("events.json")) == "events.json"


def _chain(root, value="1"):
    raw = root / "raw.tsv"
    raw.write_text(f"onset\n{value}\n")
    mid = root / "mid.tsv"
    rec = prov.build_record("step_a", {"k": 1}, {"raw": raw})
    prov.write_sidecar(mid, rec)
    mid.write_text("derived\n")
    out = root / "out.nii.gz"
    rec2 = prov.build_record("step_b", {"j": [1, 2]}, {"mid": mid})
    prov.write_sidecar(out, rec2)
    out.write_bytes(b"map")
    return rec, rec2


def test_lineage_ignores_paths_and_follows_inputs(tmp_path, monkeypatch):
    (tmp_path / "one").mkdir()
    (tmp_path / "two").mkdir()
    monkeypatch.chdir(tmp_path / "one")
    a1, b1 = _chain(tmp_path / "one")
    monkeypatch.chdir(tmp_path / "two")
    a2, b2 = _chain(tmp_path / "two")
    assert b1["lineage_hash"] == b2["lineage_hash"]
    (tmp_path / "three").mkdir()
    a3, b3 = _chain(tmp_path / "three", value="2")
    assert b3["lineage_hash"] != b1["lineage_hash"]
    # raw input lineage is its content hash; a derived input's is its producer's lineage
    assert a1["inputs"]["raw"]["lineage_hash"] == a1["inputs"]["raw"]["sha256"]
    assert b1["inputs"]["mid"]["lineage_hash"] == a1["lineage_hash"]
    assert b1["inputs"]["mid"]["params_hash"] == a1["params_hash"]
    # reference: sha256 of the canonical JSON of step, params hash and input lineages
    payload = json.dumps({"inputs": {"mid": a1["lineage_hash"]}, "params_hash": b1["params_hash"],
                          "step": "step_b"}, sort_keys=True, separators=(",", ":"))
    assert b1["lineage_hash"] == hashlib.sha256(payload.encode()).hexdigest()


def test_collect_warnings_records_messages():
    import warnings

    from glmsteps.errors import GlmstepsWarning

    with prov.collect_warnings() as seen:
        warnings.warn("events past the end", GlmstepsWarning, stacklevel=1)
    assert seen == ["GlmstepsWarning: events past the end"]
