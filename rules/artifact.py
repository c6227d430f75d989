"""Compiled-model artifacts: a directory with ``manifest.json`` and ``arrays.npz``.

Never pickle: arrays are read with ``allow_pickle=False`` and the manifest is JSON. The manifest
records each array's sha256 and the model's content hash; :func:`load_model` recomputes both and
refuses a changed or truncated artifact. Writes go to a temporary sibling directory that is then
renamed into place, so a reader never sees half an artifact.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import tempfile
import zipfile
from pathlib import Path
from typing import Any, Callable

import numpy as np

from stateworth.errors import ArtifactError, StateworthError
from stateworth.rules.compiled import FORMAT, CompiledModel, compile_model
from stateworth.rules.spec import parse_spec

MANIFEST = "manifest.json"
ARRAYS = "arrays.npz"


def _sha(a: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest()


def save_model(model: CompiledModel, path: str | Path, extra: dict[str, np.ndarray] | None = None,
               files: dict[str, Any] | None = None, texts: dict[str, str] | None = None,
               before_publish: Callable[[Path], None] | None = None) -> Path:
    """Write ``model`` to directory ``path`` atomically (replacing an existing artifact).

    ``extra`` arrays are stored beside the tables (e.g. sensitivity tables); ``files`` are extra
    JSON documents (e.g. ``diagnostics.json``), ``texts`` extra text files (``diagnostics.txt``):
    all written before the directory appears. ``before_publish(tmp)`` may add more to the
    directory (stored solved values) before it appears."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    arrays: dict[str, np.ndarray] = {}
    for k, v in model.tables.items():
        arrays[f"table.{k}"] = np.ascontiguousarray(v, dtype=np.float64)
    for k, v in model.draws.items():
        arrays[f"draws.{k}"] = np.ascontiguousarray(v, dtype=np.float64)
    for k, v in (extra or {}).items():
        arrays[f"extra.{k}"] = np.ascontiguousarray(v)
    manifest = {
        "format": FORMAT,
        "name": model.name,
        "hash": model.hash,
        "version": model.version,
        "spec": model.spec.canonical(),
        "beta": model.beta,
        "n_states": model.n_states,
        "grid": model.grid.describe(),
        "factors": [{"axis": f.axis, "given": list(f.given), "shape": list(f.shape)} for f in model.factors],
        "streams": list(model.streams),
        "metadata": model.metadata,
        "arrays": {k: {"shape": list(v.shape), "dtype": str(v.dtype), "sha256": _sha(v)} for k, v in arrays.items()},
    }
    tmp = Path(tempfile.mkdtemp(prefix=f".{path.name}.tmp-", dir=path.parent))
    try:
        with open(tmp / ARRAYS, "wb") as fh:
            np.savez(fh, **arrays)
        for fname, doc in (files or {}).items():
            (tmp / fname).write_text(json.dumps(doc, indent=2, sort_keys=True, default=str))
        for fname, text in (texts or {}).items():
            (tmp / fname).write_text(text, encoding="utf-8")
        if before_publish is not None:
            before_publish(tmp)
        # not sort_keys: the order of the spec's axes is meaningful (grid order, draw order)
        (tmp / MANIFEST).write_text(json.dumps(manifest, indent=2))
        if path.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{path.name}.old-", dir=path.parent))
            os.rename(path, old / "artifact")
            os.rename(tmp, path)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, path)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return path


def read_manifest(path: str | Path) -> dict:
    path = Path(path)
    mpath = path / MANIFEST
    if not mpath.is_file():
        raise ArtifactError(f"no {MANIFEST}; this is not a compiled model directory "
                            "(write one with `stateworth fit` or `stateworth solve --save`)", where=str(path))
    try:
        manifest = json.loads(mpath.read_text())
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise ArtifactError(f"{MANIFEST} is not valid JSON ({e}); the artifact is damaged, rebuild it",
                            where=str(path)) from None
    if manifest.get("format") != FORMAT:
        raise ArtifactError(f"unknown artifact format {manifest.get('format')!r}; expected {FORMAT}", where=str(path))
    return manifest


def load_model(path: str | Path) -> tuple[CompiledModel, dict[str, np.ndarray]]:
    """Load and verify an artifact. Returns the model and its ``extra`` arrays."""
    path = Path(path)
    manifest = read_manifest(path)
    try:
        with np.load(path / ARRAYS, allow_pickle=False) as npz:
            arrays = {k: npz[k] for k in npz.files}
    except FileNotFoundError:
        raise ArtifactError(f"{ARRAYS} is missing; the artifact is incomplete, rebuild it", where=str(path)) from None
    except (zipfile.BadZipFile, ValueError, OSError, EOFError) as e:
        raise ArtifactError(f"{ARRAYS} cannot be read ({e.__class__.__name__}: {e}); the artifact is truncated "
                            "or damaged, rebuild it", where=str(path)) from None
    listed = manifest.get("arrays", {})
    if set(listed) != set(arrays):
        raise ArtifactError(f"{ARRAYS} holds {sorted(arrays)} but the manifest lists {sorted(listed)}; "
                            "the artifact was changed, rebuild it", where=str(path))
    for k, meta in listed.items():
        if _sha(arrays[k]) != meta["sha256"]:
            raise ArtifactError(f"array '{k}' does not match its checksum; the artifact was changed after it "
                                "was written, rebuild it", where=str(path))
    try:
        spec = parse_spec(manifest["spec"], source=f"{path}/{MANIFEST}")
    except StateworthError as e:
        raise ArtifactError(f"the stored spec is invalid: {e}", where=str(path)) from None
    tables = {k[6:]: v for k, v in arrays.items() if k.startswith("table.")}
    draws = {k[6:]: v for k, v in arrays.items() if k.startswith("draws.")}
    extra = {k[6:]: v for k, v in arrays.items() if k.startswith("extra.")}
    model = compile_model(spec, tables, source=str(path), metadata=manifest.get("metadata", {}), draws=draws)
    if model.hash != manifest.get("hash"):
        raise ArtifactError("content hash does not match the manifest; the artifact was changed after it was "
                            "written, rebuild it", where=str(path))
    return model, extra
