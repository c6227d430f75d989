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


# ---- versioned model folders: publishing by one rename ---------------------------------------
def _other(model):
    """The same spec with other status tables: another version."""
    t = {k: v.copy() for k, v in model.tables.items()}
    t["status"][0, 0] = [0.85, 0.15]
    return model.with_tables(t)


def test_a_model_folder_holds_versions_behind_a_current_link(model, tmp_path):
    import os

    folder = save_model(model, tmp_path / "m", texts={"diagnostics.txt": "first\n"})
    first = model_files(folder)
    assert os.readlink(folder / "current") == f"versions/{first.name}"
    assert first.parent == folder / "versions" and first.name.startswith(model.version + "-")
    assert sorted(p.name for p in first.iterdir()) == ["arrays.npz", "diagnostics.txt", "manifest.json"]
    b = _other(model)
    save_model(b, folder)
    second = model_files(folder)
    assert second != first and load_model(folder)[0].hash == b.hash
    save_model(model, folder)  # a third version: the oldest goes, the one before current stays
    third = model_files(folder)
    assert sorted(p.name for p in (folder / "versions").iterdir()) == sorted([second.name, third.name])
    assert load_model(folder)[0].hash == model.hash and read_manifest(folder)["hash"] == model.hash
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m"]  # nothing temporary beside it


def test_same_content_keeps_the_version_and_what_is_stored_in_it(model, tmp_path):
    folder = save_model(model, tmp_path / "m", files={"diagnostics.json": {"run": 1}})
    d = model_files(folder)
    (d / "solutions").mkdir()
    (d / "solutions" / "revenue.npy").write_bytes(b"stored later")
    save_model(model, folder, files={"diagnostics.json": {"run": 2}})
    assert model_files(folder) == d and (d / "solutions" / "revenue.npy").read_bytes() == b"stored later"
    assert json.loads((d / "diagnostics.json").read_text()) == {"run": 2}  # side files follow the last write


def test_a_flat_artifact_is_still_read_and_becomes_versioned_on_its_next_write(model, tmp_path):
    flat = tmp_path / "flat"
    flat.mkdir()
    folder = save_model(model, tmp_path / "m", files={"diagnostics.json": {"x": 1}})
    for f in model_files(folder).iterdir():  # the older layout: files directly in the folder
        (flat / f.name).write_bytes(f.read_bytes())
    assert model_files(flat) == flat and load_model(flat)[0].hash == model.hash
    save_model(_other(model), flat)
    assert sorted(p.name for p in flat.iterdir() if not p.name.startswith(".")) == ["current", "versions"]
    assert load_model(flat)[0].hash == _other(model).hash


def test_a_folder_that_is_not_a_model_is_never_overwritten(model, tmp_path):
    other = tmp_path / "notes"
    other.mkdir()
    (other / "readme.txt").write_text("mine")
    with pytest.raises(ArtifactError, match=r"not a model folder"):
        save_model(model, other)
    assert (other / "readme.txt").read_text() == "mine"
    save_model(model, tmp_path / "empty")  # a new folder is fine, and so is an empty one
    (tmp_path / "empty2").mkdir()
    assert load_model(save_model(model, tmp_path / "empty2"))[0].hash == model.hash


def test_readers_see_the_old_version_or_the_new_one_whole_while_versions_are_written(model, tmp_path):
    import threading

    folder = save_model(model, tmp_path / "m")
    b = _other(model)
    hashes = {model.hash, b.hash}
    stop = threading.Event()
    seen, errors = set(), []

    def read() -> None:
        while not stop.is_set():
            try:
                seen.add(load_model(folder)[0].hash)
                assert read_manifest(folder)["hash"] in hashes
            except BaseException as e:  # noqa: BLE001 - collected and reported below
                errors.append(e)
                return

    readers = [threading.Thread(target=read) for _ in range(2)]
    for t in readers:
        t.start()
    for k in range(40):
        save_model(b if k % 2 == 0 else model, folder)
    stop.set()
    for t in readers:
        t.join(60)
    assert not errors, errors[:2]
    assert seen <= hashes and seen
    assert len(list((folder / "versions").iterdir())) <= 2


_KILLED_WRITER = """
import sys, time
import numpy as np
sys.path.insert(0, {tests!r})
import stateworth.rules.artifact as artifact
from test_artifact import SPEC, _other
from stateworth.rules import compile_model, parse_spec
real = artifact._write_file
def slow(p, data=None, arrays=None):
    if p.name == "manifest.json":
        print("writing", flush=True)
        time.sleep(60)
    real(p, data, arrays)
artifact._write_file = slow
artifact.save_model(_other(compile_model(parse_spec(SPEC))), {folder!r})
"""


def test_a_killed_writer_leaves_the_model_whole_and_its_leftovers_are_cleaned(model, tmp_path):
    import os
    import signal
    import subprocess
    import sys
    from pathlib import Path

    from stateworth.rules import clean_leftovers

    folder = save_model(model, tmp_path / "m")
    code = _KILLED_WRITER.format(tests=str(Path(__file__).parent), folder=str(folder))
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    try:
        assert proc.stdout.readline().strip() == "writing"  # killed in the middle of its write
        staged = [p for p in (folder / "versions").iterdir() if p.name.startswith(".tmp-")]
        assert len(staged) == 1
        assert clean_leftovers(tmp_path) == []  # its writer lives: the staged version stays
    finally:
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    assert load_model(folder)[0].hash == model.hash  # the model is the old version, whole
    done = clean_leftovers(tmp_path)
    assert [(d["action"], d["path"]) for d in done] == [("removed", f"m/versions/{staged[0].name}")]
    assert not staged[0].exists()


def test_leftovers_of_the_older_layout_are_recovered_or_removed(model, tmp_path):
    import os
    import time

    from stateworth.rules import clean_leftovers

    # killed between its two renames: the folder moved aside, the new one never moved in
    aside = tmp_path / ".m.old-x1"
    aside.mkdir()
    save_model(model, aside / "artifact")
    half = tmp_path / ".m.tmp-x2"  # and its half-written replacement, without a lock
    half.mkdir()
    (half / "arrays.npz").write_bytes(b"half")
    old = time.time() - 3600
    os.utime(half, (old, old))
    done = clean_leftovers(tmp_path)
    assert {(d["action"], d["path"]) for d in done} == {("recovered", "m"), ("removed", ".m.old-x1"),
                                                        ("removed", ".m.tmp-x2")}
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m"]
    assert load_model(tmp_path / "m")[0].hash == model.hash


# ---- reading defensively -----------------------------------------------------------------------
def test_a_fifo_named_like_an_artifact_file_is_refused_without_blocking(saved):
    import os
    import threading

    arrays = model_files(saved) / "arrays.npz"
    arrays.unlink()
    os.mkfifo(arrays)
    out: dict = {}

    def load() -> None:
        try:
            load_model(saved)
        except ArtifactError as e:
            out["error"] = str(e)

    t = threading.Thread(target=load, daemon=True)
    t.start()
    t.join(60)  # a blocking open would never return; the test fails instead of hanging
    assert "a FIFO, not a regular file" in out.get("error", "")


def _npz_header_claiming(path, key: str, shape: tuple) -> None:
    """Rewrite member ``key`` of the npz so its .npy header declares ``shape`` (data unchanged)."""
    with zipfile.ZipFile(path) as zin:
        members = {n: zin.read(n) for n in zin.namelist()}
    data = members[key + ".npy"]
    arr = np.lib.format.read_array(io.BytesIO(data))
    head = io.BytesIO()
    np.lib.format.write_array_header_1_0(head, {"descr": np.lib.format.dtype_to_descr(arr.dtype),
                                                "fortran_order": False, "shape": shape})
    members[key + ".npy"] = head.getvalue() + arr.tobytes()
    with zipfile.ZipFile(path, "w") as zout:
        for n, b in members.items():
            zout.writestr(n, b)


def test_a_small_archive_declaring_a_huge_array_is_refused_before_it_is_read(saved, monkeypatch):
    import stateworth.rules.artifact as artifact

    files = model_files(saved)
    original = (files / "manifest.json").read_text()
    manifest = json.loads(original)
    huge = [2**28]  # 2 GiB of float64 declared, in an archive of a few KiB
    manifest["arrays"]["extra.values"]["shape"] = huge
    (files / "manifest.json").write_text(json.dumps(manifest))
    _npz_header_claiming(files / "arrays.npz", "extra.values", tuple(huge))

    def never(*a, **k):
        raise AssertionError("an array was read")

    monkeypatch.setattr(artifact.np.lib.format, "read_array", never)
    with pytest.raises(ArtifactError, match=r"the manifest declares arrays of 2,048.* MiB but arrays\.npz has"):
        load_model(saved)
    # the manifest honest, the archive's header alone claiming the huge array
    (files / "manifest.json").write_text(original)
    with pytest.raises(ArtifactError, match=r"member 'extra\.values' declares \(268435456,\) float64 but holds"):
        load_model(saved)


def test_links_leaving_the_served_folder_are_refused(model, tmp_path):
    import os

    served, outside = tmp_path / "served", tmp_path / "outside"
    save_model(model, outside / "m")
    served.mkdir()
    os.symlink(outside / "m", served / "linked")
    assert load_model(served / "linked")[0].hash == model.hash  # outside a server, the user's links are theirs
    with pytest.raises(ArtifactError, match=r"leads outside the served folder"):
        load_model(served / "linked", root=served)
    inner = save_model(model, served / "own")
    arrays = model_files(inner) / "arrays.npz"
    arrays.unlink()
    os.symlink(model_files(outside / "m") / "arrays.npz", arrays)
    with pytest.raises(ArtifactError, match=r"arrays\.npz is a symbolic link .* outside the served folder"):
        load_model(inner, root=served)
    save_model(model, served / "clean")
    os.symlink(served / "clean", served / "alias")  # a link that stays inside is fine
    assert load_model(served / "alias", root=served)[0].hash == model.hash


@pytest.mark.parametrize("doc, match", [
    ([1, 2], r"manifest\.json holds an array, not a JSON object"),
    (None, r"manifest\.json holds null, not a JSON object"),
    ("drop-spec", r"manifest\.json lacks 'spec' \(the model's spec\)"),
    ("spec-list", r"manifest\.json key 'spec' is an array, expected an object"),
    ("arrays-bad", r"entry arrays\['table\.status'\] has no shape"),
])
def test_a_manifest_of_the_wrong_shape_gets_a_message(saved, doc, match):
    files = model_files(saved)
    manifest = json.loads((files / "manifest.json").read_text())
    if doc == "drop-spec":
        del manifest["spec"]
        doc = manifest
    elif doc == "spec-list":
        manifest["spec"] = []
        doc = manifest
    elif doc == "arrays-bad":
        manifest["arrays"]["table.status"]["shape"] = "big"
        doc = manifest
    (files / "manifest.json").write_text(json.dumps(doc))
    with pytest.raises(ArtifactError, match=match) as e:
        load_model(saved)
    assert "Error" not in str(e.value)  # a message, not an exception class name
