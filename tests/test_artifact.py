"""Compiled-model artifacts: the round trip is exact, and a changed or damaged one is refused."""

from __future__ import annotations

import io
import json
import zipfile

import jax.numpy as jnp
import numpy as np
import pytest

from stateworth.errors import ArtifactError
from stateworth.rules import compile_model, load_model, model_files, parse_spec, read_manifest, save_model

SPEC = {
    "model": {"name": "artifact", "discount": {"annual_rate": 0.08}},
    "axes": {
        "market": {"kind": "fixed", "levels": ["a", "b"]},
        "age": {"kind": "counter", "size": 3, "advance_while": "member", "reset_on": ["join"]},
        "status": {"kind": "status", "levels": ["out", "in"], "members": ["in"], "given": ["status", "market"],
                   "table": [{"when": {"status": "out"}, "probs": {"out": 0.9, "in": 0.1}},
                             {"when": {"status": "in"}, "probs": {"out": 0.2, "in": 0.8}},
                             {"when": {"status": "in", "market": "b"}, "probs": {"out": 0.3, "in": 0.7}}]},
    },
    "rewards": {"revenue": {"price": {"in": {"a": 9.0, "b": 11.0}}, "on_join": -2.0}},
}


@pytest.fixture(scope="module")
def model():
    return compile_model(parse_spec(SPEC))


@pytest.fixture()
def saved(model, tmp_path):
    extra = {"values": np.arange(model.n_states, dtype=np.float64)}
    return save_model(model, tmp_path / "model", extra=extra, files={"diagnostics.json": {"note": "x"}})


def test_round_trip(model, saved):
    loaded, extra = load_model(saved)
    assert loaded.hash == model.hash and loaded.version == model.version
    assert loaded.spec.canonical() == model.spec.canonical()
    assert set(loaded.tables) == set(model.tables)
    for k in model.tables:
        np.testing.assert_array_equal(loaded.tables[k], model.tables[k])
    assert set(loaded.rewards) == set(model.rewards)
    for k in model.rewards:
        np.testing.assert_array_equal(loaded.rewards[k], model.rewards[k])
    x = jnp.asarray(np.random.default_rng(0).normal(size=model.n_states))
    np.testing.assert_array_equal(np.asarray(loaded.operator.mv(x)), np.asarray(model.operator.mv(x)))
    assert loaded.beta == model.beta
    np.testing.assert_array_equal(extra["values"], np.arange(model.n_states))
    assert json.loads((model_files(saved) / "diagnostics.json").read_text()) == {"note": "x"}
    manifest = read_manifest(saved)
    assert manifest["hash"] == model.hash and manifest["n_states"] == model.n_states


def test_hash_depends_on_tables_and_spec(model):
    t = {k: v.copy() for k, v in model.tables.items()}
    t["status"][0, 0] = [0.8, 0.2]
    assert model.with_tables(t).hash != model.hash
    spec = json.loads(json.dumps(SPEC))
    spec["rewards"]["revenue"]["on_join"] = -3.0
    assert compile_model(parse_spec(spec)).hash != model.hash
    assert compile_model(parse_spec(SPEC)).hash == model.hash


def test_save_replaces_atomically_and_leaves_no_temporaries(model, saved):
    save_model(model, saved)
    assert sorted(p.name for p in saved.parent.iterdir()) == ["model"]
    assert load_model(saved)[0].hash == model.hash


def test_failed_save_leaves_nothing_half_written(model, tmp_path, monkeypatch):
    import stateworth.rules.artifact as artifact

    def boom(*a, **k):
        raise OSError("disk full")

    monkeypatch.setattr(artifact.np, "savez", boom)
    with pytest.raises(OSError):
        save_model(model, tmp_path / "model")
    assert list(tmp_path.iterdir()) == []


def _rewrite_npz(path, change):
    path = model_files(path)
    with np.load(path / "arrays.npz", allow_pickle=False) as npz:
        arrays = {k: npz[k].copy() for k in npz.files}
    change(arrays)
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    (path / "arrays.npz").write_bytes(buf.getvalue())
    return arrays


def test_changed_array_bytes_are_refused(saved):
    def change(arrays):
        arrays["table.status"][0, 0, 0] += 1e-12
    _rewrite_npz(saved, change)
    with pytest.raises(ArtifactError, match=r"array 'table\.status' does not match its checksum"):
        load_model(saved)


def test_changed_array_with_matching_checksum_is_refused_by_the_content_hash(saved):
    """A consistent forgery (array and its checksum both changed) still fails the content hash."""
    import hashlib

    def change(arrays):
        arrays["table.status"][0, 0] = [0.85, 0.15]
    arrays = _rewrite_npz(saved, change)
    manifest = json.loads((model_files(saved) / "manifest.json").read_text())
    a = np.ascontiguousarray(arrays["table.status"])
    manifest["arrays"]["table.status"]["sha256"] = hashlib.sha256(a.tobytes()).hexdigest()
    (model_files(saved) / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(ArtifactError, match=r"content hash does not match the manifest"):
        load_model(saved)


def test_changed_manifest_spec_is_refused(saved):
    manifest = json.loads((model_files(saved) / "manifest.json").read_text())
    manifest["spec"]["rewards"]["revenue"]["on_join"] = 0.0
    (model_files(saved) / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(ArtifactError, match=r"content hash does not match"):
        load_model(saved)


def test_changed_manifest_hash_is_refused(saved):
    manifest = json.loads((model_files(saved) / "manifest.json").read_text())
    manifest["hash"] = "0" * 64
    (model_files(saved) / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(ArtifactError, match=r"content hash does not match"):
        load_model(saved)


def test_manifest_not_json_is_refused(saved):
    (model_files(saved) / "manifest.json").write_text("{not json")
    with pytest.raises(ArtifactError, match=r"manifest\.json is not valid JSON"):
        load_model(saved)


def test_invalid_stored_spec_is_refused(saved):
    manifest = json.loads((model_files(saved) / "manifest.json").read_text())
    manifest["spec"]["model"]["discount"]["annual_rate"] = 7.0
    (model_files(saved) / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(ArtifactError, match=r"the stored spec is invalid: .*annual_rate"):
        load_model(saved)


def test_unknown_format_is_refused(saved):
    manifest = json.loads((model_files(saved) / "manifest.json").read_text())
    manifest["format"] = "something/9"
    (model_files(saved) / "manifest.json").write_text(json.dumps(manifest))
    with pytest.raises(ArtifactError, match=r"unknown artifact format"):
        load_model(saved)


@pytest.mark.parametrize("keep", [0.5, 0.9])
def test_truncated_arrays_are_refused(saved, keep):
    data = (model_files(saved) / "arrays.npz").read_bytes()
    (model_files(saved) / "arrays.npz").write_bytes(data[: int(len(data) * keep)])
    with pytest.raises(ArtifactError, match=r"arrays\.npz cannot be read .*truncated or damaged"):
        load_model(saved)


def test_array_missing_from_the_archive_is_refused(saved):
    _rewrite_npz(saved, lambda arrays: arrays.pop("extra.values"))
    with pytest.raises(ArtifactError, match=r"but the manifest lists"):
        load_model(saved)


def test_pickled_array_is_refused(saved):
    buf = io.BytesIO()
    with zipfile.ZipFile(model_files(saved) / "arrays.npz") as zin, zipfile.ZipFile(buf, "w") as zout:
        for name in zin.namelist():
            zout.writestr(name, zin.read(name))
    # an object array can only be stored pickled; loading with allow_pickle=False must refuse it
    obj = io.BytesIO()
    np.save(obj, np.array([{"a": 1}], dtype=object), allow_pickle=True)
    with zipfile.ZipFile(buf, "a") as zout:
        zout.writestr("extra.evil.npy", obj.getvalue())
    (model_files(saved) / "arrays.npz").write_bytes(buf.getvalue())
    with pytest.raises(ArtifactError, match=r"arrays\.npz cannot be read"):
        load_model(saved)


@pytest.mark.parametrize("name,match", [("arrays.npz", r"arrays\.npz is missing"),
                                        ("manifest.json", r"no manifest\.json")])
def test_missing_file_is_refused(saved, name, match):
    (model_files(saved) / name).unlink()
    with pytest.raises(ArtifactError, match=match):
        load_model(saved)


def test_not_a_directory_is_refused(tmp_path):
    with pytest.raises(ArtifactError, match=r"no manifest\.json; this is not a compiled model directory"):
        load_model(tmp_path / "nothing")
