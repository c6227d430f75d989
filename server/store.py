"""The model store: every artifact of the model directory, solved and held in memory.

A *snapshot* maps model name -> version -> :class:`Served` (a solved
:class:`~stateworth.valuation.Valuer` with its manifest). The store holds one snapshot at a
time; a request takes the current snapshot once, at its start, and answers from it, so a call in
flight finishes on the version it started with however many reloads happen meanwhile.

A (re)load builds the next snapshot off to the side (artifacts whose content hash is already
served are reused, new ones are loaded, verified and solved) and only then replaces the
reference, one assignment under the reload lock: readers see the old snapshot or the new one,
never a mixture. Model folders are read through :func:`stateworth.rules.artifact.model_files`
(one version's files, whatever a writer publishes meanwhile) and never outside the model
directory. A reload answers an :class:`Outcome` per folder: a folder that cannot be loaded
keeps serving the version it had (its outcome says why), a folder that is gone is no longer
served. A single load (``load_one``) that fails leaves the snapshot untouched. Before scanning,
what interrupted writes left is removed (or moved back), one log line each.

The served path is a folder of model folders, or one model folder (then it alone is served).
The default version of a model (the one that answers requests that pin none) is the version the
operator marks (``serve --default NAME=VERSION``, else the folder's :data:`DEFAULTS_FILE`), else
the version written last (by ``fit`` or ``solve --save``: its manifest's modification time; ties
by artifact directory name). A marked version that is not served falls back to the newest, with
a warning; every change of a default is logged (``default_changed``).
"""

from __future__ import annotations

import logging
import threading
import time
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, Callable, Mapping

from stateworth.errors import StateworthError
from stateworth.server.errors import LoadError, NotFoundError, UnavailableError, invalid

log = logging.getLogger("stateworth.server")

PREFIX = "models/"


@dataclass(frozen=True, eq=False)
class Served:
    """One solved model version. ``valuer`` answers the queries; ``artifact`` is the directory
    name inside the model directory; ``build_seconds`` the load + solve time."""

    name: str
    version: str
    artifact: str
    valuer: Any
    manifest: dict
    diagnostics: dict
    mtime: float
    load_time: float
    build_seconds: float

    @property
    def resource(self) -> str:
        return PREFIX + self.name

    @cached_property
    def _index(self) -> tuple[tuple[str, ...], tuple[dict[str, int], ...], tuple[int, ...]]:
        grid = self.valuer.model.grid
        strides = []
        acc = 1
        for size in reversed(grid.shape):
            strides.append(acc)
            acc *= size
        return (grid.names, tuple({lv: i for i, lv in enumerate(a.levels)} for a in grid.axes),
                tuple(reversed(strides)))

    @cached_property
    def _columns(self) -> dict[str, Any]:
        return {}

    @cached_property
    def _units(self) -> dict[str, str]:
        return {}

    def column(self, stream: str):
        """V of every state for ``stream`` (infinite horizon) as one ``(n,)`` array, looked up
        once through the valuation layer and kept (the hot path of single-value calls)."""
        col = self._columns.get(stream)
        if col is None:
            import numpy as np
            col = self.valuer.values(np.arange(self.valuer.model.n_states), stream)
            self._columns[stream] = col
        return col

    def unit(self, stream: str) -> str:
        """Unit of ``stream`` (QueryError naming the streams when unknown); remembered."""
        units = self._units
        u = units.get(stream)
        if u is None:
            u = units[stream] = self.valuer.unit(stream)
        return u

    def quick_index(self, coords: Mapping[str, str]) -> int | None:
        """Flat index of a full coordinate given by level names, or None when anything is off
        (the caller then asks the valuation layer, whose error names the axis or level). The
        hot path of single-value calls: plain dictionary lookups, no arrays; ``coords`` may be
        the request's protobuf map itself."""
        names, lookups, strides = self._index
        if len(coords) != len(names):
            return None
        i = 0
        for name, lookup, stride in zip(names, lookups, strides):
            code = lookup.get(coords.get(name, None))  # type: ignore[arg-type]
            if code is None:
                return None
            i += code * stride
        return i

    @property
    def content_hash(self) -> str:
        return self.valuer.model.hash


@dataclass(frozen=True)
class Snapshot:
    """Immutable view of what is served: name -> version -> Served, and each default version."""

    models: dict[str, dict[str, Served]] = field(default_factory=dict)
    defaults: dict[str, str] = field(default_factory=dict)
    generation: int = 0
    #: why each default is the default: MARKED_OPTION, MARKED_FILE or NEWEST
    default_reasons: dict[str, str] = field(default_factory=dict)

    @property
    def empty(self) -> bool:
        return not self.models

    def all(self) -> list[Served]:
        return [s for name in sorted(self.models) for s in self.models[name].values()]

    def resolve(self, resource: str, version: str = "", field_name: str = "name",
                version_field: str = "version") -> Served:
        """The version a request names. INVALID_ARGUMENT for a malformed name, NOT_FOUND for an
        unknown model or version, UNAVAILABLE while nothing is loaded."""
        name = parse_name(resource, field_name)
        if self.empty:
            raise UnavailableError("no model is loaded yet; retry shortly, or load one with the admin "
                                   "LoadModel call")
        versions = self.models.get(name)
        if versions is None:
            raise NotFoundError(f"unknown model '{PREFIX}{name}'; models are "
                                f"{', '.join(PREFIX + n for n in sorted(self.models))}", field=field_name)
        v = version or self.defaults[name]
        if v not in versions:
            raise NotFoundError(f"model '{PREFIX}{name}' has no version '{v}'; versions are "
                                f"{', '.join(sorted(versions))}", field=version_field)
        return versions[v]


def parse_name(resource: str, field_name: str = "name") -> str:
    """``"models/{model}"`` -> ``"{model}"`` (INVALID_ARGUMENT naming the field otherwise)."""
    if not resource:
        raise invalid("name is required: give the model as models/{model} (see ListModels)", field_name)
    if not resource.startswith(PREFIX) or len(resource) == len(PREFIX) or "/" in resource[len(PREFIX):]:
        raise invalid(f"name must be of the form models/{{model}} (got {resource[:80]!r})", field_name)
    return resource[len(PREFIX):]


def _diagnostics(files: Path, manifest: dict, root: Path) -> dict:
    """Fit diagnostics stored with an artifact: ``diagnostics.json`` or the manifest metadata."""
    from stateworth.rules.artifact import read_json_file

    try:
        doc: Any = read_json_file(files / "diagnostics.json", "diagnostics.json", files, root)
    except (OSError, StateworthError):
        doc = None
    if doc is None:
        doc = (manifest.get("metadata") or {}).get("diagnostics")
    return doc if isinstance(doc, dict) else {}


def model_folders(root: Path) -> list[Path]:
    """The entries of ``root`` that may be model folders: visible directories (links included:
    loading refuses those that lead outside ``root``). Names starting with a dot are writers'
    temporary directories and are skipped. ``root`` itself when it is a model folder."""
    if not root.is_dir():
        raise LoadError(f"model directory {root} does not exist or is not a directory")
    if _looks_like_model(root):
        return [root]
    return sorted(p for p in root.iterdir() if not p.name.startswith(".") and p.is_dir())


def check_served_path(root: Path, allow_empty: bool = False) -> None:
    """ConfigError (``serve`` exits 1) unless ``root`` is a model folder or a folder holding at
    least one (``allow_empty``: a folder without one yet, for models loaded later by an admin
    call)."""
    from stateworth.server.errors import ConfigError

    if not root.exists():
        raise ConfigError("does not exist; give a model folder (written by `stateworth fit -o` or "
                          "`stateworth solve --save`) or a folder of them", where=str(root))
    if not root.is_dir():
        raise ConfigError("is a file, not a folder; give a model folder or a folder of model folders",
                          where=str(root))
    if allow_empty or _looks_like_model(root):
        return
    if not any(_looks_like_model(p) for p in model_folders(root)):
        raise ConfigError("holds no model folder (a folder with a current link or a manifest.json); write one "
                          "with `stateworth fit -o` or `stateworth solve --save`, or pass --allow-empty to start "
                          "without models and load them later with an admin call", where=str(root))


#: the file in a folder of model folders that marks default versions (see :func:`read_defaults`)
DEFAULTS_FILE = "defaults.toml"
#: why a version is its model's default
MARKED_OPTION, MARKED_FILE, NEWEST = "marked by --default", f"marked in {DEFAULTS_FILE}", "newest written"


def parse_default(text: str) -> tuple[str, str]:
    """``NAME=VERSION`` (a ``serve --default`` value) -> (name, version); ConfigError otherwise."""
    from stateworth.server.errors import ConfigError

    name, sep, version = text.partition("=")
    name, version = name.strip(), version.strip()
    if name.startswith(PREFIX):
        name = name[len(PREFIX):]
    if not sep or not name or not version or "/" in name:
        raise ConfigError(f"'{text}' is not NAME=VERSION (e.g. fitness-demo=3fa9c2d1; `stateworth query models` "
                          "lists the versions)", where="--default")
    return name, version


def read_defaults(root: Path) -> dict[str, str]:
    """The marks of ``root/defaults.toml``: a table ``[default_versions]`` of model name ->
    version, e.g. ``fitness-demo = "3fa9c2d1"``. Empty when there is no such file; ConfigError
    naming the file and key when it cannot be read or has another shape."""
    import tomllib

    from stateworth.server.errors import ConfigError

    path = root / DEFAULTS_FILE
    if not path.is_file():
        return {}
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as e:
        raise ConfigError(f"cannot be read as TOML ({e}); write [default_versions] with lines NAME = \"VERSION\"",
                          where=str(path)) from None
    extra = sorted(set(doc) - {"default_versions"})
    table = doc.get("default_versions", {})
    if extra or not isinstance(table, dict):
        raise ConfigError(f"unknown key(s) {', '.join(extra) or 'default_versions'}; the file holds one table "
                          "[default_versions] with lines NAME = \"VERSION\"", where=str(path))
    bad = [k for k, v in table.items() if not isinstance(v, str) or not v.strip()]
    if bad:
        raise ConfigError(f"default_versions.{bad[0]} must be a version text (e.g. \"3fa9c2d1\")", where=str(path))
    return {k: v.strip() for k, v in table.items()}


def check_artifact_name(artifact: str) -> None:
    """INVALID_ARGUMENT unless ``artifact`` is a plain folder name (no separators, not hidden,
    no NUL, at most 255 bytes: what a file system accepts)."""
    if (not artifact or "/" in artifact or "\\" in artifact or "\0" in artifact or artifact.startswith(".")
            or len(artifact.encode("utf-8", "surrogatepass")) > 255):
        raise invalid("artifact must be the name of a folder inside the model directory (no path separators, "
                      f"not hidden, at most 255 bytes); got {artifact[:80]!r}"
                      + ("..." if len(artifact) > 80 else ""), "artifact")


#: what a reload did with one model folder (the ``result`` of :class:`Outcome`)
LOADED, KEPT, FAILED, REMOVED = "loaded", "kept", "failed", "removed"


@dataclass(frozen=True)
class Outcome:
    """One model folder after a reload: ``result`` is LOADED (a new version built), KEPT (the
    same content, still served), FAILED (could not be loaded: ``error`` says why, and the
    version it served before, if any, is still served) or REMOVED (its folder is gone)."""

    artifact: str
    result: str
    name: str = ""
    version: str = ""
    error: str = ""


@dataclass(frozen=True)
class ReloadReport:
    """The snapshot a reload swapped in and what happened to each model folder."""

    snapshot: Snapshot
    outcomes: tuple[Outcome, ...]
    dropped: int

    def count(self, result: str) -> int:
        return sum(1 for o in self.outcomes if o.result == result)

    @property
    def loaded(self) -> int:
        return self.count(LOADED)

    @property
    def kept(self) -> int:
        return self.count(KEPT)

    @property
    def failed(self) -> int:
        return self.count(FAILED)


class ModelStore:
    """Holds the current :class:`Snapshot` of ``root`` and swaps it atomically on reloads.

    ``build`` turns a compiled model into its Valuer (default ``Valuer.build``; tests may slow
    it down to widen the reload window)."""

    def __init__(self, root: str | Path, build: Callable[[Any], Any] | None = None,
                 horizon_cache_bytes: int | None = None, defaults: Mapping[str, str] | None = None) -> None:
        from stateworth.valuation.solved import HORIZON_CACHE_BYTES, HorizonCache

        self.root = Path(root)
        self._snapshot = Snapshot()
        self._reload_lock = threading.Lock()
        self._build = build
        self.listeners: list[Callable[[Snapshot], None]] = []
        #: default versions marked on the command line (they win over the defaults file)
        self.marked = dict(defaults or {})
        self._file_marks: dict[str, str] = {}
        #: finite-horizon values of every served model, within one byte bound (LRU)
        self.horizons = HorizonCache(HORIZON_CACHE_BYTES if horizon_cache_bytes is None else horizon_cache_bytes)

    @property
    def snapshot(self) -> Snapshot:
        """The current snapshot (take it once per request)."""
        return self._snapshot

    # ---- building ---------------------------------------------------------------------------
    def _load(self, path: Path, reuse: dict[str, Served]) -> Served:
        """Load (or reuse) the current version of model folder ``path``; LoadError says why not."""
        from stateworth.rules.artifact import MANIFEST, load_model, model_files, read_manifest

        try:
            for attempt in range(3):  # a version replaced while it is read is read again
                files = model_files(path, self.root)
                try:
                    manifest = read_manifest(files, self.root)
                    mtime = (files / MANIFEST).stat().st_mtime
                    known = reuse.get(manifest["hash"])
                    if known is not None and known.artifact == path.name:
                        return known
                    t0 = time.perf_counter()
                    model, _extra = load_model(files, self.root)
                    break
                except (StateworthError, FileNotFoundError):
                    if attempt < 2 and files != path and not files.exists():
                        continue
                    raise
            if self._build is not None:
                valuer = self._build(model)
            else:
                # values stored with the model (by fit or solve) are served as they are; a stored
                # solution that does not match its model refuses the model (StoredValuesError);
                # a model without one is solved here
                from stateworth.valuation import Valuer
                from stateworth.valuation import stored
                try:
                    valuer = Valuer(stored.load(files, model))
                except FileNotFoundError:
                    valuer = Valuer.build(model)
            solved = getattr(valuer, "solved", None)
            if solved is not None and hasattr(solved, "horizons"):
                solved.horizons = self.horizons.scoped(model.hash)
        except StateworthError as e:
            raise LoadError(f"artifact '{path.name}' could not be loaded: {e}; the serving models are unchanged",
                            field="artifact") from None
        except OSError as e:
            raise LoadError(f"artifact '{path.name}' could not be read ({e.strerror or e}); the serving models are "
                            "unchanged", field="artifact") from None
        except Exception as e:  # noqa: BLE001 - a bad artifact must never take down the server
            log.error("artifact load failed unexpectedly", extra={"fields": {
                "event": "load_error", "artifact": path.name, "exception": e.__class__.__name__}})
            raise LoadError(f"artifact '{path.name}' could not be loaded: an unexpected error while building it "
                            "(see the server log); the serving models are unchanged", field="artifact") from None
        return Served(name=model.name, version=model.version, artifact=path.name, valuer=valuer,
                      manifest=manifest, diagnostics=_diagnostics(files, manifest, self.root), mtime=mtime,
                      load_time=time.time(), build_seconds=time.perf_counter() - t0)

    @property
    def single(self) -> bool:
        """Whether the served path is one model folder (not a folder of them)."""
        return _looks_like_model(self.root)

    def _read_marks(self) -> None:
        """Re-read the defaults file (a reload picks up an edit); on a bad file keep the marks
        read before and log why."""
        if self.single:
            return
        try:
            self._file_marks = read_defaults(self.root)
        except StateworthError as e:
            log.warning("defaults file not read; the defaults marked before are kept", extra={"fields": {
                "event": "defaults_file_error", "error": str(e)}})

    def _assemble(self, served: list[Served], generation: int) -> Snapshot:
        models: dict[str, dict[str, Served]] = {}
        for s in served:
            models.setdefault(s.name, {}).setdefault(s.version, s)
        defaults, reasons = {}, {}
        for name, vs in models.items():
            for marks, why in ((self.marked, MARKED_OPTION), (self._file_marks, MARKED_FILE)):
                v = marks.get(name)
                if v is None:
                    continue
                if v in vs:
                    defaults[name], reasons[name] = v, why
                    break
                log.warning("the version marked as default is not served; the newest answers", extra={"fields": {
                    "event": "default_not_served", "model": name, "marked": v, "by": why,
                    "served": sorted(vs)}})
            if name not in defaults:
                defaults[name] = max(vs.values(), key=lambda s: (s.mtime, s.artifact)).version
                reasons[name] = NEWEST
        return Snapshot(models=models, defaults=defaults, generation=generation, default_reasons=reasons)

    def _swap(self, snap: Snapshot) -> None:
        old = self._snapshot
        for name, v in sorted(snap.defaults.items()):
            if old.defaults.get(name) != v:
                log.info("default version changed", extra={"fields": {
                    "event": "default_changed", "model": name, "from": old.defaults.get(name), "to": v,
                    "why": snap.default_reasons.get(name)}})
        self._snapshot = snap
        for fn in self.listeners:
            fn(snap)

    def clean(self) -> list[dict[str, str]]:
        """Remove (or restore) what interrupted writes left in the model directory, one log line
        each (see :func:`stateworth.rules.artifact.clean_leftovers`)."""
        from stateworth.rules.artifact import clean_leftovers

        from stateworth.rules.artifact import clean_model_folder

        if not self.root.is_dir():
            done = []
        elif self.single:
            done = clean_model_folder(self.root)
        else:
            done = clean_leftovers(self.root)
        for d in done:
            log.warning(f"leftover of an interrupted write {d['action']}", extra={"fields": {
                "event": "leftover", **d}})
        return done

    # ---- public -----------------------------------------------------------------------------
    def reload_all(self) -> ReloadReport:
        """Rescan the model directory: load what changed, keep what did not.

        A model folder that cannot be loaded (missing or broken files) keeps serving the version
        it served before, and its outcome says why; a folder that is gone is no longer served.
        Raises LoadError (snapshot unchanged) when the directory itself cannot be read, or when
        nothing was served before and no folder could be loaded."""
        with self._reload_lock:
            self.clean()
            self._read_marks()
            old = self._snapshot
            reuse = {s.content_hash: s for s in old.all()}
            before: dict[str, list[Served]] = {}
            for s in old.all():
                before.setdefault(s.artifact, []).append(s)
            served: list[Served] = []
            outcomes: list[Outcome] = []
            first_error: LoadError | None = None
            seen = set()
            for p in model_folders(self.root):
                seen.add(p.name)
                if p.name not in before and not _looks_like_model(p):
                    continue  # not a model folder (and never was one here)
                try:
                    s = self._load(p, reuse)
                except LoadError as e:
                    first_error = first_error or e
                    prev = before.get(p.name, [])
                    served += prev
                    outcomes.append(Outcome(p.name, FAILED, name=prev[0].name if prev else "",
                                            version=prev[0].version if prev else "", error=e.message))
                    log.warning("model folder could not be loaded; its previous version (if any) is still served",
                                extra={"fields": {"event": "reload_failed_model", "artifact": p.name,
                                                  "kept_version": prev[0].version if prev else None,
                                                  "error": e.message}})
                    continue
                served.append(s)
                outcomes.append(Outcome(p.name, KEPT if any(s is o for o in reuse.values()) else LOADED,
                                        name=s.name, version=s.version))
            for artifact, prev in before.items():
                if artifact not in seen:
                    outcomes.append(Outcome(artifact, REMOVED, name=prev[0].name))
            if first_error is not None and old.empty and not served:
                raise first_error
            new = self._assemble(served, old.generation + 1)
            new_keys = {(s.name, s.version) for s in new.all()}
            dropped = sum(1 for s in old.all() if (s.name, s.version) not in new_keys)
            self._swap(new)
            report = ReloadReport(new, tuple(outcomes), dropped)
            log.info("models reloaded", extra={"fields": {
                "event": "reload", "generation": new.generation, "loaded": report.loaded, "kept": report.kept,
                "failed": report.failed, "dropped": dropped,
                "versions": [f"{s.name}@{s.version}" for s in new.all()]}})
            return report

    def load_one(self, artifact: str) -> tuple[Served, bool]:
        """Load (or reload) one artifact directory; other artifacts' versions stay as they are.

        Returns (served, replaced): ``replaced`` when the artifact previously served another
        version (that version is dropped). Raises LoadError / QueryError (snapshot unchanged)."""
        check_artifact_name(artifact)
        path = self.root if self.single and artifact == self.root.name else self.root / artifact
        try:
            present = path.is_dir() and _looks_like_model(path)
        except OSError:
            present = False
        if not present:
            raise NotFoundError(f"no artifact '{artifact}' in the model directory (no model folder of that name)",
                                field="artifact")
        with self._reload_lock:
            self._read_marks()
            old = self._snapshot
            reuse = {s.content_hash: s for s in old.all()}
            s = self._load(path, reuse)
            others = [o for o in old.all() if o.artifact != artifact]
            replaced = any(o.artifact == artifact and o.version != s.version for o in old.all())
            new = self._assemble(others + [s], old.generation + 1)
            self._swap(new)
            log.info("model loaded", extra={"fields": {"event": "load", "generation": new.generation,
                                                       "model": s.name, "version": s.version,
                                                       "artifact": artifact, "replaced": replaced}})
            return s, replaced


def _looks_like_model(p: Path) -> bool:
    from stateworth.rules.artifact import is_model_dir

    return is_model_dir(p)
