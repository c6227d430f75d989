"""Solved values kept with the model: written once by ``solve`` (or ``fit``), read by every query.

Layout: ``VERSION_DIR/solutions/<key>/`` (``VERSION_DIR`` the version folder the model folder's
``current`` link names, :func:`stateworth.rules.artifact.model_files`: values are stored with the
version they were solved for) with ``values.npy`` ``(n, k)``, ``draws.npy`` ``(D, n, k)``
when the model has posterior draws, ``longrun.npy`` ``(n,)`` when the chain has a unique long-run
mix, and ``solution.json``: the format, the model's content hash, the solver settings, the
streams, the solve statistics, and each array's shape, dtype, byte size and sha256. ``<key>`` is a
short hash of the format and the settings, so solutions under other settings sit side by side.
The folder is written whole or not at all (:func:`stateworth.files.atomic_dir`); arrays are
``.npy`` read with ``allow_pickle=False``, never pickle. ``reachable.npy`` ``(n,)`` (bool) marks
the states the chain can ever be in (:mod:`.reach`).

A stored solution that does not match its model (another model version, a truncated or edited
array, a newer format, other settings, a file where a folder should be) raises
:class:`StoredValuesError` with the reason: the command line then says so in one line and
solves again; the server refuses to serve the model.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import time
from pathlib import Path
from typing import Any

import numpy as np

from stateworth.errors import ArtifactError
from stateworth.files import atomic_dir
from stateworth.valuation.solved import Settings, Solved

FORMAT = "stateworth.solution/1"
FOLDER = "solutions"
MANIFEST = "solution.json"
#: the arrays a solution may hold, and their types
DTYPES = {"values": "float64", "draws": "float64", "longrun": "float64", "reachable": "bool"}
#: a solution.json larger than this is not one of ours (it holds statistics, not arrays)
MANIFEST_MAX_BYTES = 4 * 1024**2


class StoredValuesError(ArtifactError):
    """A stored solution exists but cannot be used for this model (see the module doc)."""


def key(settings: Settings) -> str:
    """The folder name of a solution under ``settings``."""
    doc = json.dumps({"format": FORMAT, **settings.to_dict()}, sort_keys=True)
    return hashlib.sha256(doc.encode()).hexdigest()[:12]


def files_dir(model_dir: str | Path) -> Path:
    """The folder stored values go in: the current version's folder of a versioned model folder,
    else ``model_dir`` itself (a version folder, a flat artifact, or a version being written)."""
    from stateworth.rules.artifact import CURRENT, model_files

    p = Path(model_dir)
    return model_files(p) if os.path.lexists(p / CURRENT) else p


def location(model_dir: str | Path, settings: Settings = Settings()) -> Path:
    return files_dir(model_dir) / FOLDER / key(settings)


def _npy_bytes(a: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, np.ascontiguousarray(a), allow_pickle=False)
    return buf.getvalue()


def save(model_dir: str | Path, solved: Solved) -> Path:
    """Write ``solved`` into ``model_dir`` (replacing a solution with the same settings).
    Raises OSError when the folder cannot be written."""
    arrays: dict[str, np.ndarray] = {"values": solved.values}
    if solved.draws is not None:
        arrays["draws"] = solved.draws
    if solved.longrun is not None:
        arrays["longrun"] = solved.longrun
    if solved.reachable is not None:
        arrays["reachable"] = solved.reachable
    arrays = {name: np.asarray(a, dtype=DTYPES[name]) for name, a in arrays.items()}
    files = {name: _npy_bytes(a) for name, a in arrays.items()}
    manifest = {
        "format": FORMAT,
        "model_hash": solved.model.hash,
        "version": solved.model.version,
        "settings": solved.settings.to_dict(),
        "streams": list(solved.streams),
        "states": int(solved.model.n_states),
        "draws": solved.n_draws,
        "written": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        "stats": _plain(solved.stats),
        "arrays": {name: {"file": f"{name}.npy", "shape": list(np.shape(arrays[name])), "dtype": DTYPES[name],
                          "bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
                   for name, data in files.items()},
    }
    target = location(model_dir, solved.settings)
    with atomic_dir(target) as tmp:
        for name, data in files.items():
            (tmp / f"{name}.npy").write_bytes(data)
        (tmp / MANIFEST).write_text(json.dumps(manifest, indent=1))
    return target


def _plain(x: Any) -> Any:
    if isinstance(x, dict):
        return {str(k): _plain(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_plain(v) for v in x]
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, float) and not np.isfinite(x):
        return None
    return x


def exists(model_dir: str | Path, settings: Settings = Settings()) -> bool:
    return (location(model_dir, settings) / MANIFEST).exists()


def _read_regular(path: Path, limit: int, what: str) -> bytes:
    """A regular file's bytes, refusing anything else (a FIFO, a device, a folder) and files over
    ``limit`` bytes before reading them."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise StoredValuesError(f"{what} is missing", where=str(path.parent)) from None
    import stat as stat_mod
    if not stat_mod.S_ISREG(st.st_mode):
        raise StoredValuesError(f"{what} is not a regular file", where=str(path.parent))
    if st.st_size > limit:
        raise StoredValuesError(f"{what} holds {st.st_size:,} bytes, more than the {limit:,} its manifest allows",
                                where=str(path.parent))
    return path.read_bytes()


def load(model_dir: str | Path, model, settings: Settings = Settings()) -> Solved:
    """The stored solution of ``model`` under ``settings``, verified (see the module doc).
    FileNotFoundError when there is none; StoredValuesError when there is one that cannot be used."""
    folder = location(model_dir, settings)
    mpath = folder / MANIFEST
    if not folder.exists() and not folder.is_symlink():
        raise FileNotFoundError(str(folder))
    where = str(folder)
    raw = _read_regular(mpath, MANIFEST_MAX_BYTES, MANIFEST)
    try:
        doc = json.loads(raw)
    except (json.JSONDecodeError, UnicodeDecodeError):
        raise StoredValuesError(f"{MANIFEST} is not valid JSON", where=where) from None
    if not isinstance(doc, dict):
        raise StoredValuesError(f"{MANIFEST} is not a JSON object", where=where)
    fmt = doc.get("format")
    if fmt != FORMAT:
        raise StoredValuesError(f"written in format {fmt!r}, which this version of stateworth does not read "
                                f"(it reads {FORMAT})", where=where)
    if doc.get("model_hash") != model.hash:
        raise StoredValuesError(f"solved for model version {str(doc.get('version'))[:12]!r}, not {model.version}",
                                where=where)
    if doc.get("settings") != settings.to_dict():
        raise StoredValuesError("solved under other settings than its folder name says", where=where)
    streams = doc.get("streams")
    if not isinstance(streams, list) or tuple(streams) != tuple(model.streams):
        raise StoredValuesError(f"holds streams {streams!r}, the model has {list(model.streams)}", where=where)
    listed = doc.get("arrays")
    if not isinstance(listed, dict) or "values" not in listed:
        raise StoredValuesError("lists no values array", where=where)
    n, k = model.n_states, len(streams)
    D = int(next(iter(model.draws.values())).shape[0]) if model.draws else 0
    expected = {"values": (n, k), "draws": (D, n, k), "longrun": (n,), "reachable": (n,)}
    arrays: dict[str, np.ndarray] = {}
    for name, meta in listed.items():
        if name not in expected or not isinstance(meta, dict):
            raise StoredValuesError(f"lists an unknown array {name!r}", where=where)
        shape = tuple(meta.get("shape") or ())
        if shape != expected[name]:
            raise StoredValuesError(f"array {name} has shape {shape}, the model needs {expected[name]}", where=where)
        size = np.dtype(DTYPES[name]).itemsize * int(np.prod(shape, dtype=np.int64)) + 4096
        data = _read_regular(folder / f"{name}.npy", size, f"{name}.npy")
        if len(data) != meta.get("bytes") or hashlib.sha256(data).hexdigest() != meta.get("sha256"):
            raise StoredValuesError(f"{name}.npy does not match its checksum (truncated or edited)", where=where)
        try:
            a = np.load(io.BytesIO(data), allow_pickle=False)
        except (ValueError, OSError, EOFError) as e:
            raise StoredValuesError(f"{name}.npy cannot be read ({e})", where=where) from None
        if a.shape != expected[name] or a.dtype != np.dtype(DTYPES[name]):
            raise StoredValuesError(f"{name}.npy holds {a.dtype} {a.shape}, expected {DTYPES[name]} "
                                    f"{expected[name]}", where=where)
        arrays[name] = a
    if D and "draws" not in arrays:
        raise StoredValuesError(f"holds no values for the model's {D} posterior draws", where=where)
    stats = doc.get("stats") if isinstance(doc.get("stats"), dict) else {}
    return Solved(model=model, streams=tuple(streams), values=arrays["values"], draws=arrays.get("draws"),
                  longrun=arrays.get("longrun"), stats=stats, settings=settings,
                  source=f"stored {doc.get('written', '')}".strip(), reachable=arrays.get("reachable"))
