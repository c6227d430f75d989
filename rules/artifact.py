"""Compiled-model artifacts: model folders holding versions, published by one atomic rename.

Layout of a model folder ``MODEL`` (what ``stateworth fit -o MODEL`` and ``save_model`` write)::

    MODEL/current -> versions/<version>-<stamp>       a relative symbolic link
    MODEL/versions/<version>-<stamp>/manifest.json    the spec, shapes, checksums, content hash
    MODEL/versions/<version>-<stamp>/arrays.npz       the tables (uncompressed npz, never pickled)
    MODEL/versions/<version>-<stamp>/...              diagnostics, and whatever is stored later

A new version is written whole into a temporary directory under ``versions/``, renamed to its
final name, and published by replacing ``current`` with one ``rename`` of a new link: a reader
at any instant finds the old version whole or the new one whole, never a gap. Writing the same
content again keeps the version directory (and anything stored in it since). After a swap the
current version and the one before it are kept (a reader that resolved ``current`` just before
the swap still finds its files); older ones are removed. Folders of the older flat layout
(``manifest.json`` directly in ``MODEL``) are still read, and become versioned on their next
write. :func:`model_files` resolves either layout to the directory holding the manifest: every
reader goes through it.

Reading is defensive, since a served folder may be changed by anyone who can write to it:
regular files only (a FIFO or device is refused before it is opened for reading), the
manifest's shape checked before anything in it is used, every array's declared size checked
against the archive and the memory limit before any array is read, and, given the folder a
server serves (``root``), no symbolic link may lead outside it. :func:`load_model` recomputes
every array's sha256 and the model's content hash and refuses a changed or truncated artifact.

A writer that is killed leaves hidden ``.tmp-*`` directories, which hold a ``.writing`` file
locked (``flock``) while their writer lives; :func:`clean_leftovers` removes those whose writer
is gone and restores folders the older layout had moved aside.
"""

from __future__ import annotations

import contextlib
import errno
import fcntl
import hashlib
import json
import math
import os
import secrets
import shutil
import stat
import tempfile
import time
import zipfile
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Callable, Iterator

import numpy as np

from stateworth import config
from stateworth.errors import ArtifactError, StateworthError
from stateworth.files import write_text
from stateworth.rules.compiled import FORMAT, CompiledModel, compile_model
from stateworth.rules.spec import parse_spec

MANIFEST = "manifest.json"
ARRAYS = "arrays.npz"
CURRENT = "current"
VERSIONS = "versions"
#: versions kept in a model folder after a swap: the current one and the one before it
KEEP_VERSIONS = 2
#: largest manifest or JSON side file read (a manifest holds a spec, shapes and checksums)
MAX_JSON_BYTES = 64 * 2**20
#: a temporary directory without a ``.writing`` lock is taken as abandoned after this many s
ABANDONED_SECONDS = 10.0
_WRITING = ".writing"
_LOCK = ".lock"


def _sha(a: np.ndarray) -> str:
    return hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest()


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


# ---- where the files are ----------------------------------------------------------------------
def is_model_dir(path: str | Path) -> bool:
    """Whether ``path`` looks like a model folder of either layout (a ``current`` link, a
    ``versions`` directory or a flat ``manifest.json``), whole or damaged."""
    p = Path(path)
    try:
        return p.is_dir() and (os.path.lexists(p / CURRENT) or (p / VERSIONS).is_dir()
                               or os.path.lexists(p / MANIFEST))
    except OSError:
        return False


def _inside(p: Path, root: Path | None, what: str, where: Path) -> None:
    """Refuse ``p`` when, links followed, it is not inside ``root``."""
    if root is None:
        return
    real, base = os.path.realpath(p), os.path.realpath(root)
    if real != base and not real.startswith(base.rstrip(os.sep) + os.sep):
        raise ArtifactError(f"{what} is a symbolic link (or lies under one) that leads outside the served folder "
                            f"{root}; copy the files into it instead", where=str(where))


def model_files(path: str | Path, root: str | Path | None = None) -> Path:
    """The directory holding the current version's ``manifest.json``: ``path/versions/NAME``
    when ``path/current`` links there, ``path`` itself for a flat artifact (or a version
    directory given directly). Raises ArtifactError naming the folder when neither is there, or
    when ``current`` is not a link to ``versions/NAME`` or leads to a missing version; with
    ``root`` (the folder a server serves), also when any link leads outside ``root``.

    The answer names the version directory itself, not the link, so files read through it
    all come from one version even if ``current`` moves meanwhile."""
    path = Path(path)
    base = Path(root) if root is not None else None
    _inside(path, base, "the model folder", path)
    link = path / CURRENT
    if os.path.lexists(link):
        try:
            target = os.readlink(link)
        except OSError:
            raise ArtifactError(f"{CURRENT} is not a symbolic link to {VERSIONS}/NAME; the folder was changed by "
                                "hand, rewrite it with `stateworth fit` or `stateworth solve --save`",
                                where=str(path)) from None
        parts = Path(target).parts
        if len(parts) != 2 or parts[0] != VERSIONS or parts[1] in (".", "..") or parts[1].startswith("."):
            raise ArtifactError(f"{CURRENT} must link to {VERSIONS}/NAME inside the model folder (it links to "
                                f"{target[:120]!r}); rewrite it with `stateworth fit` or `stateworth solve --save`",
                                where=str(path))
        d = path / VERSIONS / parts[1]
        if not d.is_dir():
            raise ArtifactError(f"{CURRENT} links to {target}, which is missing; the version was removed by hand, "
                                "rewrite the model", where=str(path))
        _inside(d, base, f"{VERSIONS}/{parts[1]}", path)
        return d
    if os.path.lexists(path / MANIFEST):
        return path
    raise ArtifactError(f"no {MANIFEST}; this is not a compiled model directory "
                        "(write one with `stateworth fit` or `stateworth solve --save`)", where=str(path))


def _open_regular(p: Path, what: str, where: Path, root: Path | None) -> tuple[int, int]:
    """(file descriptor, size) of a regular file. Opened without blocking, so a FIFO or device
    named like an artifact file is refused, never waited on; links may not leave ``root``."""
    if not os.path.lexists(p):
        raise FileNotFoundError(p)
    _inside(p, root, what, where)
    try:
        fd = os.open(p, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_CLOEXEC", 0))
    except FileNotFoundError:
        raise
    except OSError as e:
        raise ArtifactError(f"{what} cannot be opened ({e.strerror}); check its permissions", where=str(where)) from None
    st = os.fstat(fd)
    if not stat.S_ISREG(st.st_mode):
        os.close(fd)
        kind = ("a directory" if stat.S_ISDIR(st.st_mode) else "a FIFO" if stat.S_ISFIFO(st.st_mode)
                else "a socket" if stat.S_ISSOCK(st.st_mode) else "a device")
        raise ArtifactError(f"{what} is {kind}, not a regular file; rebuild the artifact", where=str(where))
    return fd, st.st_size


def read_json_file(p: Path, what: str, where: Path, root: Path | None = None) -> Any:
    """A JSON document from a regular file of at most :data:`MAX_JSON_BYTES` (FileNotFoundError
    when absent; ArtifactError when it is not a regular file, too large or not JSON)."""
    fd, size = _open_regular(p, what, where, root)
    with os.fdopen(fd, "rb") as fh:
        if size > MAX_JSON_BYTES:
            raise ArtifactError(f"{what} is {size / 2**20:.0f} MiB, over the {MAX_JSON_BYTES // 2**20} MiB a "
                                "stateworth JSON file may have; it was not written by stateworth, rebuild it",
                                where=str(where))
        data = fh.read(MAX_JSON_BYTES + 1)
    try:
        return json.loads(data)
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise ArtifactError(f"{what} is not valid JSON ({e}); the artifact is damaged, rebuild it",
                            where=str(where)) from None


# ---- the manifest -----------------------------------------------------------------------------
_KIND = {dict: "an object", list: "an array", str: "a string", int: "a number", float: "a number",
         bool: "true or false", type(None): "null"}


def _kind(x: Any) -> str:
    return _KIND.get(type(x), type(x).__name__)


def check_manifest(doc: Any, where: str) -> dict:
    """The manifest when it has the shape :func:`save_model` writes; else an ArtifactError
    saying which key is missing or of the wrong type (never an exception class name)."""
    damaged = "the artifact is damaged or was not written by stateworth, rebuild it"
    if not isinstance(doc, dict):
        raise ArtifactError(f"{MANIFEST} holds {_kind(doc)}, not a JSON object; {damaged}", where=where)
    if doc.get("format") != FORMAT:
        raise ArtifactError(f"unknown artifact format {str(doc.get('format'))[:40]!r}; expected {FORMAT}", where=where)
    for key, typ, what in (("name", str, "the model's name"), ("hash", str, "the content hash"),
                           ("version", str, "the model version"), ("spec", dict, "the model's spec"),
                           ("arrays", dict, "the list of stored arrays")):
        if key not in doc:
            raise ArtifactError(f"{MANIFEST} lacks '{key}' ({what}); {damaged}", where=where)
        if not isinstance(doc[key], typ):
            raise ArtifactError(f"{MANIFEST} key '{key}' is {_kind(doc[key])}, expected {_KIND[typ]}; {damaged}",
                                where=where)
    if not isinstance(doc.get("metadata", {}), dict):
        raise ArtifactError(f"{MANIFEST} key 'metadata' is {_kind(doc['metadata'])}, expected an object; {damaged}",
                            where=where)
    for name, meta in doc["arrays"].items():
        bad = None
        if not isinstance(meta, dict):
            bad = f"is {_kind(meta)}, expected an object"
        elif not (isinstance(meta.get("shape"), list)
                  and all(isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in meta["shape"])):
            bad = "has no shape (a list of counts >= 0)"
        elif not isinstance(meta.get("dtype"), str) or not isinstance(meta.get("sha256"), str):
            bad = "lacks its dtype or sha256 text"
        else:
            try:
                dt = np.dtype(meta["dtype"])
            except (TypeError, ValueError):
                dt = None
            if dt is None or dt.hasobject:
                bad = f"has dtype {meta['dtype'][:40]!r}, not a numeric type"
        if bad:
            raise ArtifactError(f"{MANIFEST} entry arrays['{name[:80]}'] {bad}; {damaged}", where=where)
    return doc


def read_manifest(path: str | Path, root: str | Path | None = None) -> dict:
    """The checked manifest of the model folder (or flat artifact) ``path``."""
    path = Path(path)
    d = model_files(path, root)
    try:
        doc = read_json_file(d / MANIFEST, MANIFEST, d, None if root is None else Path(root))
    except FileNotFoundError:
        raise ArtifactError(f"no {MANIFEST}; this is not a compiled model directory "
                            "(write one with `stateworth fit` or `stateworth solve --save`)", where=str(d)) from None
    return check_manifest(doc, str(d))


# ---- the arrays -------------------------------------------------------------------------------
def _npy_header(f) -> tuple[tuple[int, ...], np.dtype, int]:
    """(shape, dtype, header length) of an .npy stream, reading its header only."""
    version = np.lib.format.read_magic(f)
    read = {(1, 0): np.lib.format.read_array_header_1_0, (2, 0): np.lib.format.read_array_header_2_0}.get(version)
    if read is None:
        raise ValueError(f"unsupported .npy version {version}")
    shape, _fortran, dtype = read(f)
    return tuple(shape), dtype, f.tell()


def _read_arrays(d: Path, manifest: dict, root: Path | None) -> dict[str, np.ndarray]:
    """Every array of ``d/arrays.npz``, after checking the sizes the manifest declares against the
    file, the archive's own directory and headers, and the memory limit: nothing is allocated for
    an array before its bytes are known to be in the file."""
    where = str(d)
    listed = manifest["arrays"]
    declared = {k: (tuple(m["shape"]), np.dtype(m["dtype"])) for k, m in listed.items()}
    nbytes = {k: math.prod(s) * dt.itemsize for k, (s, dt) in declared.items()}
    fd, size = _open_regular(d / ARRAYS, ARRAYS, d, root)
    with os.fdopen(fd, "rb") as fh:
        total = sum(nbytes.values())
        limit = config.memory_limit_bytes()
        if total > size or total > limit:
            raise ArtifactError(f"the manifest declares arrays of {total / 2**20:,.1f} MiB but {ARRAYS} has "
                                f"{size / 2**20:,.1f} MiB (memory limit {limit / 2**30:.1f} GiB); the artifact is "
                                "truncated or changed, rebuild it", where=where)
        damaged = "the artifact is truncated or damaged, rebuild it"
        try:
            with zipfile.ZipFile(fh) as zf:
                members: dict[str, zipfile.ZipInfo] = {}
                for info in zf.infolist():
                    key = info.filename[:-4] if info.filename.endswith(".npy") else info.filename
                    if info.compress_type != zipfile.ZIP_STORED or info.compress_size != info.file_size:
                        raise ArtifactError(f"{ARRAYS} member '{key[:80]}' is compressed; stateworth writes "
                                            f"uncompressed archives, {damaged}", where=where)
                    with zf.open(info) as f:
                        shape, dtype, head = _npy_header(f)
                    if dtype.hasobject:
                        raise ArtifactError(f"{ARRAYS} cannot be read (member '{key[:80]}' holds Python objects, "
                                            f"which are never unpickled); {damaged}", where=where)
                    if head + math.prod(shape) * dtype.itemsize != info.file_size:
                        raise ArtifactError(f"{ARRAYS} member '{key[:80]}' declares {shape} {dtype} but holds "
                                            f"{info.file_size:,} bytes; {damaged}", where=where)
                    members[key] = info
                    if key in declared and (shape, dtype) != declared[key]:
                        raise ArtifactError(f"array '{key[:80]}' is {shape} {dtype} in {ARRAYS} but "
                                            f"{declared[key][0]} {declared[key][1]} in the manifest; the artifact was "
                                            "changed, rebuild it", where=where)
                if set(members) != set(declared):
                    raise ArtifactError(f"{ARRAYS} holds {sorted(members)[:20]} but the manifest lists "
                                        f"{sorted(declared)[:20]}; the artifact was changed, rebuild it", where=where)
                arrays = {}
                for k, info in members.items():
                    with zf.open(info) as f:
                        arrays[k] = np.lib.format.read_array(f, allow_pickle=False)
        except ArtifactError:
            raise
        except (zipfile.BadZipFile, ValueError, OSError, EOFError, KeyError) as e:
            raise ArtifactError(f"{ARRAYS} cannot be read ({e.__class__.__name__}: {str(e)[:200]}); {damaged}",
                                where=where) from None
    return arrays


def load_model(path: str | Path, root: str | Path | None = None) -> tuple[CompiledModel, dict[str, np.ndarray]]:
    """Load and verify the current version of a model folder (or a flat artifact). Returns the
    model and its ``extra`` arrays. With ``root`` (the folder a server serves), links leading
    outside it are refused. A version replaced while it is read is read again from the new one."""
    path = Path(path)
    base = None if root is None else Path(root)
    for attempt in range(3):
        d = model_files(path, base)
        try:
            return _load_version(d, base)
        except FileNotFoundError:
            if attempt < 2 and _moved(path, d, base):
                continue
            raise ArtifactError(f"{ARRAYS} is missing; the artifact is incomplete, rebuild it",
                                where=str(d)) from None
        except ArtifactError:
            if attempt < 2 and _moved(path, d, base):
                continue
            raise
    raise AssertionError("unreachable")  # pragma: no cover


def _moved(path: Path, d: Path, root: Path | None) -> bool:
    """Whether ``path``'s current version is no longer ``d`` (replaced while being read)."""
    try:
        return model_files(path, root) != d
    except ArtifactError:
        return False


def _load_version(d: Path, root: Path | None) -> tuple[CompiledModel, dict[str, np.ndarray]]:
    manifest = read_manifest(d, root)
    arrays = _read_arrays(d, manifest, root)
    listed = manifest["arrays"]
    for k, meta in listed.items():
        if _sha(arrays[k]) != meta["sha256"]:
            raise ArtifactError(f"array '{k}' does not match its checksum; the artifact was changed after it "
                                "was written, rebuild it", where=str(d))
    try:
        spec = parse_spec(manifest["spec"], source=f"{d}/{MANIFEST}")
    except StateworthError as e:
        raise ArtifactError(f"the stored spec is invalid: {e}", where=str(d)) from None
    tables = {k[6:]: v for k, v in arrays.items() if k.startswith("table.")}
    draws = {k[6:]: v for k, v in arrays.items() if k.startswith("draws.")}
    extra = {k[6:]: v for k, v in arrays.items() if k.startswith("extra.")}
    try:
        model = compile_model(spec, tables, source=str(d), metadata=manifest.get("metadata", {}), draws=draws)
    except StateworthError as e:
        raise ArtifactError(f"the stored tables do not fit the stored spec: {e}", where=str(d)) from None
    if model.hash != manifest.get("hash"):
        raise ArtifactError("content hash does not match the manifest; the artifact was changed after it was "
                            "written, rebuild it", where=str(d))
    return model, extra


# ---- writing ----------------------------------------------------------------------------------
@contextlib.contextmanager
def _writing_dir(parent: Path, prefix: str) -> Iterator[Path]:
    """A fresh hidden directory under ``parent`` holding a ``.writing`` file locked while this
    writer lives (so :func:`clean_leftovers` can tell a live write from a killed one); removed
    if the block fails. The lock file is the caller's to unlink once the directory is moved."""
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=prefix, dir=parent))
    fd = None
    try:
        # locked under another name first, then renamed: a cleaner never finds it unlocked
        fd = os.open(tmp / f"{_WRITING}.new", os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0), 0o666 & ~_umask())
        fcntl.flock(fd, fcntl.LOCK_EX)
        os.rename(tmp / f"{_WRITING}.new", tmp / _WRITING)
        tmp.chmod(0o777 & ~_umask())  # mkdtemp makes it private; model folders are meant to be shared
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    finally:
        if fd is not None:
            os.close(fd)


@contextlib.contextmanager
def _publish_lock(folder: Path, blocking: bool = True) -> Iterator[bool]:
    """``flock`` on ``folder/.lock`` around a swap of ``current`` and the pruning after it (two
    writers of one model folder publish one after the other). Yields False when not blocking and
    another process holds it, or when the lock file cannot be created (a read-only folder)."""
    try:
        fd = os.open(folder / _LOCK, os.O_RDWR | os.O_CREAT | getattr(os, "O_CLOEXEC", 0), 0o666 & ~_umask())
    except OSError:
        if blocking:
            raise
        yield False
        return
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX if blocking else fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            yield False
            return
        yield True
    finally:
        os.close(fd)


def _fsync_dir(d: Path) -> None:
    try:
        fd = os.open(d, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _write_file(p: Path, data: bytes | None = None, arrays: dict[str, np.ndarray] | None = None) -> None:
    with open(p, "wb") as fh:
        if arrays is not None:
            np.savez(fh, **arrays)
        else:
            fh.write(data or b"")
        fh.flush()
        os.fsync(fh.fileno())


def _json_bytes(doc: Any) -> bytes:
    return json.dumps(doc, indent=2, sort_keys=True, default=str).encode()


def _write_version(d: Path, arrays: dict[str, np.ndarray], manifest: dict, files: dict[str, Any],
                   texts: dict[str, str], before_publish: Callable[[Path], None] | None = None) -> None:
    """Fill version directory ``d``: arrays, side files, ``before_publish(d)``'s additions, and
    the manifest last."""
    _write_file(d / ARRAYS, arrays=arrays)
    for fname, doc in files.items():
        _write_file(d / fname, _json_bytes(doc))
    for fname, text in texts.items():
        _write_file(d / fname, text.encode("utf-8"))
    if before_publish is not None:
        before_publish(d)
    # not sort_keys: the order of the spec's axes is meaningful (grid order, draw order)
    _write_file(d / MANIFEST, json.dumps(manifest, indent=2).encode())
    _fsync_dir(d)


def _stamp() -> str:
    return datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%S%fZ")


def _stamp_of(name: str) -> str:
    """The write stamp of a version directory name ``<version>-<stamp>`` (sorts by time)."""
    return name.partition("-")[2]


def _versions(folder: Path) -> list[str]:
    """Names of the complete version directories of ``folder``, oldest first."""
    vdir = folder / VERSIONS
    if not vdir.is_dir():
        return []
    return sorted((p.name for p in vdir.iterdir() if not p.name.startswith(".") and p.is_dir()
                   and not p.is_symlink()), key=lambda n: (_stamp_of(n), n))


def _current_name(folder: Path) -> str | None:
    try:
        target = Path(os.readlink(folder / CURRENT))
    except OSError:
        return None
    return target.name if target.parts[:1] == (VERSIONS,) else None


def _prune(folder: Path, keep: int = KEEP_VERSIONS) -> list[str]:
    """Remove version directories beyond the current one and the ``keep - 1`` written last
    before it; returns the names removed. Call under :func:`_publish_lock`."""
    cur = _current_name(folder)
    if cur is None:
        return []
    others = [n for n in _versions(folder) if n != cur]
    others.sort(key=lambda n: (_stamp_of(n), n))
    drop = others[: max(0, len(others) - (keep - 1))]
    for n in drop:
        shutil.rmtree(folder / VERSIONS / n, ignore_errors=True)
    return drop


def _remove_flat(folder: Path) -> list[str]:
    """Files of the flat layout left in a folder whose ``current`` link now rules (its first
    versioned write): when a flat manifest or arrays file is still there, everything but
    ``versions``, ``current`` and hidden files (a flat folder held its artifact only)."""
    if not os.path.lexists(folder / CURRENT) or not (os.path.lexists(folder / MANIFEST)
                                                     or os.path.lexists(folder / ARRAYS)):
        return []
    gone = []
    for p in folder.iterdir():
        if p.name in (VERSIONS, CURRENT) or p.name.startswith("."):
            continue
        if p.is_dir() and not p.is_symlink():
            shutil.rmtree(p, ignore_errors=True)
        else:
            p.unlink(missing_ok=True)
        gone.append(p.name)
    return gone


def _same_as_current(folder: Path, manifest: dict) -> bool:
    """Whether ``folder``'s current version holds exactly ``manifest`` (same spec, tables,
    arrays and metadata) with a regular arrays file beside it."""
    try:
        d = model_files(folder)
        doc = read_json_file(d / MANIFEST, MANIFEST, d)
        fd, _ = _open_regular(d / ARRAYS, ARRAYS, d, None)
        os.close(fd)
    except (ArtifactError, OSError):
        return False
    return doc == json.loads(json.dumps(manifest))


def _publish(folder: Path, staged: Path, name: str) -> str:
    """Move the complete version directory ``staged`` to ``folder/versions/`` and point
    ``current`` at it with one rename; prune. Returns the version directory's final name."""
    with _publish_lock(folder):
        (folder / VERSIONS).mkdir(exist_ok=True)
        final = name
        while os.path.lexists(folder / VERSIONS / final):
            final = f"{name}{secrets.token_hex(2)}"
        (staged / _WRITING).unlink(missing_ok=True)
        os.rename(staged, folder / VERSIONS / final)
        link = folder / f".{CURRENT}.tmp-{secrets.token_hex(6)}"
        os.symlink(f"{VERSIONS}/{final}", link)
        try:
            os.replace(link, folder / CURRENT)
        except BaseException:
            link.unlink(missing_ok=True)
            raise
        _fsync_dir(folder)
        _remove_flat(folder)
        _prune(folder)
    return final


def save_model(model: CompiledModel, path: str | Path, extra: dict[str, np.ndarray] | None = None,
               files: dict[str, Any] | None = None, texts: dict[str, str] | None = None,
               before_publish: Callable[[Path], None] | None = None) -> Path:
    """Write ``model`` as the new current version of model folder ``path`` (see the module
    docstring); returns ``path``.

    ``extra`` arrays are stored beside the tables (e.g. sensitivity tables); ``files`` are extra
    JSON documents (e.g. ``diagnostics.json``), ``texts`` extra text files (``diagnostics.txt``):
    all written before the version is published. ``before_publish(d)`` may add more to version
    directory ``d`` (stored solved values) before it is published (before its manifest is
    written). When the current version already holds the
    same manifest (same model, arrays and metadata), it stays, with everything stored in it, and
    only side files that differ are rewritten (each atomically). ``path`` may be new, empty, a
    model folder of either layout; anything else is refused rather than overwritten."""
    path = Path(path)
    files, texts = dict(files or {}), dict(texts or {})
    for fname in (*files, *texts):
        if fname in (MANIFEST, ARRAYS, _WRITING, _LOCK) or "/" in fname or fname.startswith("."):
            raise ValueError(f"side file name {fname!r} is reserved or not a plain name")
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
    if os.path.lexists(path):
        if not path.is_dir():
            raise ArtifactError("exists and is not a directory; give a new directory or a model folder",
                                where=str(path))
        if not is_model_dir(path) and any(p.name not in (_LOCK, _WRITING) for p in path.iterdir()):
            raise ArtifactError("exists and is not a model folder (no current link, versions or manifest.json); "
                                "give a new or empty directory, or an existing model folder", where=str(path))
    if _same_as_current(path, manifest):
        with _publish_lock(path):
            if _same_as_current(path, manifest):
                d = model_files(path)
                for fname, doc in files.items():
                    _rewrite_if_changed(d / fname, _json_bytes(doc))
                for fname, text in texts.items():
                    _rewrite_if_changed(d / fname, text.encode("utf-8"))
                if before_publish is not None:
                    before_publish(d)
                return path
    name = f"{model.version}-{_stamp()}"
    if not is_model_dir(path):
        # a first version: the whole folder appears with one rename (onto nothing, or an empty dir)
        with _writing_dir(path.parent, f".{path.name}.tmp-") as tmp:
            vdir = tmp / VERSIONS / name
            vdir.mkdir(parents=True)
            _write_version(vdir, arrays, manifest, files, texts, before_publish)
            os.symlink(f"{VERSIONS}/{name}", tmp / CURRENT)
            _fsync_dir(tmp / VERSIONS)
            _fsync_dir(tmp)
            try:
                os.rename(tmp, path)
            except OSError as e:
                if e.errno not in (errno.ENOTEMPTY, errno.EEXIST):
                    raise
                # another writer created the folder meanwhile: publish into it
                _publish(path, _restage(vdir, tmp), name)
                shutil.rmtree(tmp, ignore_errors=True)
            else:
                (path / _WRITING).unlink(missing_ok=True)
                _fsync_dir(path.parent)
        return path
    with _writing_dir(path / VERSIONS, ".tmp-") as staged:
        _write_version(staged, arrays, manifest, files, texts, before_publish)
        _publish(path, staged, name)
    return path


def _restage(vdir: Path, tmp: Path) -> Path:
    """A staged version directory moved out of a first-write folder (the lock file with it)."""
    (tmp / _WRITING).rename(vdir / _WRITING)
    return vdir


def _rewrite_if_changed(p: Path, data: bytes) -> None:
    try:
        if p.is_file() and not p.is_symlink() and p.read_bytes() == data:
            return
    except OSError:
        pass
    write_text(p, data.decode("utf-8"))


# ---- leftovers of interrupted writes ------------------------------------------------------------
def _abandoned(tmp: Path) -> bool:
    """Whether temporary directory ``tmp`` was left by a writer that is gone: its ``.writing``
    lock can be taken, or it has none and is older than :data:`ABANDONED_SECONDS`."""
    try:
        fd = os.open(tmp / _WRITING, os.O_RDONLY | os.O_NONBLOCK | getattr(os, "O_NOFOLLOW", 0))
    except FileNotFoundError:
        try:
            return time.time() - tmp.lstat().st_mtime > ABANDONED_SECONDS
        except OSError:
            return False
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return False  # its writer holds it
    finally:
        os.close(fd)
    return True


def _is_plain_dir(p: Path) -> bool:
    return p.is_dir() and not p.is_symlink()


def clean_leftovers(root: str | Path) -> list[dict[str, str]]:
    """Tidy what killed writers left in ``root`` (a folder of model folders) and in each model
    folder inside it; returns one ``{"action", "path", "why"}`` per thing done (paths relative
    to ``root``):

    * ``.NAME.tmp-*`` beside a model folder, ``versions/.tmp-*`` inside one, and a stale
      ``.current.tmp-*`` link: a write that never finished, removed once its writer is gone
      (the model keeps the version it had);
    * ``.NAME.old-*`` (the older layout moved a folder aside before moving the new one in):
      moved back to ``NAME`` when ``NAME`` is missing (recovered), removed otherwise;
    * versions beyond the kept ones and flat files beside a ``current`` link (a writer killed
      after its swap): removed.

    Nothing is touched while a writer holds a model folder's lock. Errors (a read-only folder)
    leave things as they are."""
    root = Path(root)
    done: list[dict[str, str]] = []

    def note(action: str, p: Path, why: str) -> None:
        done.append({"action": action, "path": str(p.relative_to(root)), "why": why})

    try:
        entries = sorted(root.iterdir())
    except OSError:
        return done
    for p in entries:
        n = p.name
        try:
            if n.startswith(".") and ".old-" in n and _is_plain_dir(p):
                target = root / n[1:].split(".old-", 1)[0]
                inner = next((q for q in (p / "artifact", p / target.name) if _is_plain_dir(q)), None)
                if inner is not None and not os.path.lexists(target) and is_model_dir(inner):
                    os.rename(inner, target)
                    note("recovered", target, f"moved aside by an interrupted write ({n})")
                shutil.rmtree(p, ignore_errors=True)
                note("removed", p, "the previous copy of a folder an interrupted write replaced")
            elif n.startswith(".") and ".tmp-" in n and _is_plain_dir(p):
                if _abandoned(p):
                    shutil.rmtree(p, ignore_errors=True)
                    note("removed", p, "a write that never finished")
            elif not n.startswith(".") and _is_plain_dir(p) and is_model_dir(p):
                for action, q, why in _clean_model_dir(p):
                    note(action, q, why)
        except OSError:
            continue
    return done


def clean_model_folder(folder: str | Path) -> list[dict[str, str]]:
    """:func:`clean_leftovers` for one model folder (a server serving that folder alone): its
    leftover versions, links and locks; paths relative to the folder's parent."""
    folder = Path(folder)
    try:
        done = _clean_model_dir(folder)
    except OSError:
        return []
    return [{"action": a, "path": str(q.relative_to(folder.parent)), "why": w} for a, q, w in done]


def _untidy(folder: Path) -> bool:
    """Whether a model folder holds anything :func:`_clean_model_dir` would look at (checked
    first, so tidy folders are only listed, never locked or written to)."""
    vdir = folder / VERSIONS
    names = [p.name for p in folder.iterdir()]
    if any(n.startswith(f".{CURRENT}.tmp-") or n == _WRITING for n in names):
        return True
    if CURRENT in names and (MANIFEST in names or ARRAYS in names):
        return True
    if vdir.is_dir():
        vs = [p.name for p in vdir.iterdir()]
        return any(n.startswith(".tmp-") for n in vs) or len([n for n in vs if not n.startswith(".")]) > KEEP_VERSIONS
    return False


def _clean_model_dir(folder: Path) -> list[tuple[str, Path, str]]:
    out: list[tuple[str, Path, str]] = []
    if not _untidy(folder):
        return out
    with _publish_lock(folder, blocking=False) as held:
        if not held:
            return out
        vdir = folder / VERSIONS
        if vdir.is_dir():
            for v in sorted(vdir.iterdir()):
                if v.name.startswith(".tmp-") and _is_plain_dir(v) and _abandoned(v):
                    shutil.rmtree(v, ignore_errors=True)
                    out.append(("removed", v, "a version whose write never finished"))
        for q in sorted(folder.iterdir()):
            if q.name.startswith(f".{CURRENT}.tmp-") and q.is_symlink():
                q.unlink(missing_ok=True)
                out.append(("removed", q, "a link of a swap that never finished"))
        if os.path.lexists(folder / _WRITING) and _abandoned(folder):
            (folder / _WRITING).unlink(missing_ok=True)
        if _current_name(folder) is not None and (folder / VERSIONS / _current_name(folder)).is_dir():
            for n in _remove_flat(folder):
                out.append(("removed", folder / n, "a file of the flat layout, replaced by the current version"))
            for n in _prune(folder):
                out.append(("removed", vdir / n, f"a version older than the {KEEP_VERSIONS} kept"))
    return out
