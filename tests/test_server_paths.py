"""What `stateworth serve PATH` serves: one model folder or a folder of them, a path without a
model refused at start, and the default version: marked by --default, by defaults.toml, or the
newest written; every change of default logged. The real server, on loopback."""

from __future__ import annotations

import os
import subprocess
import sys
import time

import pytest

from serving import MODEL, STATE, ServerProcess, write_artifact
from stateworth.clients import client as cl


def _serve_exit(path, *args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "stateworth", "serve", str(path), "--port", "0", *args],
                          capture_output=True, text=True, timeout=120, env=dict(os.environ, JAX_PLATFORMS="cpu"))


@pytest.mark.parametrize("case", ["empty", "missing", "file", "empty-workers"])
def test_a_path_without_a_model_is_refused_at_start(tmp_path, case):
    path = tmp_path / "models"
    if case in ("empty", "empty-workers"):
        path.mkdir()
        (path / "notes").mkdir()  # a folder, but not a model folder
    elif case == "file":
        path.write_text("not a folder")
    extra = ("--workers", "2") if case == "empty-workers" else ()
    p = _serve_exit(path, *extra)
    assert p.returncode == 1, p.stderr
    err = [ln for ln in p.stderr.splitlines() if ln.startswith("error:")]
    assert len(err) == 1 and str(path) in err[0], p.stderr
    assert "Traceback" not in p.stderr
    want = {"empty": "holds no model folder", "empty-workers": "holds no model folder", "missing": "does not exist",
            "file": "not a folder"}[case]
    assert want in err[0]


def test_a_malformed_default_is_refused(tmp_path):
    write_artifact(tmp_path, "a", seed=0)
    p = _serve_exit(tmp_path, "--default", "no-equals-sign")
    assert p.returncode == 1 and "--default" in p.stderr and "NAME=VERSION" in p.stderr, p.stderr


def test_one_model_folder_is_served_alone(tmp_path):
    v = write_artifact(tmp_path, "fitted", seed=0)
    write_artifact(tmp_path, "other", seed=1, name="other-model")  # a sibling, not served
    with ServerProcess(tmp_path / "fitted") as srv:
        c = cl.Client(srv.target, timeout=30)
        models = c.list_models().models
        assert [m.name for m in models] == [f"models/{MODEL}"]
        assert models[0].default_version == v and models[0].default_reason == "newest written"
        assert c.value(MODEL, STATE).version == v


def _defaults_file(folder, version: str) -> None:
    (folder / "defaults.toml").write_text(f'# which version answers requests that pin none\n'
                                          f'[default_versions]\n"{MODEL}" = "{version}"\n')


def _default(c) -> tuple[str, str]:
    (m,) = c.list_models().models
    return m.default_version, m.default_reason


def test_the_default_version_is_marked_or_the_newest_and_each_change_is_logged(tmp_path):
    old = write_artifact(tmp_path, "arm-a", seed=0)
    time.sleep(0.05)
    new = write_artifact(tmp_path, "arm-b", seed=1)  # written last: the newest
    _defaults_file(tmp_path, old)
    with ServerProcess(tmp_path, "--admin-open") as srv:
        c = cl.Client(srv.target, timeout=30)
        assert _default(c) == (old, "marked in defaults.toml")
        assert c.value(MODEL, STATE).version == old
        assert c.value(MODEL, STATE, version=new).version == new  # a pinned version still answers
        (tmp_path / "defaults.toml").unlink()
        c.reload_models()
        assert _default(c) == (new, "newest written")
        events = srv.wait_until(lambda evs: any(e.get("event") == "default_changed" and e.get("to") == new
                                                for e in evs))
        changes = [e for e in events if e.get("event") == "default_changed"]
        # the first default at start (from none), then the change the reload made
        assert [(e["model"], e["from"], e["to"]) for e in changes] == [(MODEL, None, old), (MODEL, old, new)]
        assert changes[1]["why"] == "newest written"
        # a mark naming a version that is not served: the newest answers, with a warning
        _defaults_file(tmp_path, "0000dead")
        c.reload_models()
        assert _default(c) == (new, "newest written")
        assert srv.wait_for("default_not_served")["marked"] == "0000dead"
        # a broken file keeps the marks read before, with a warning
        (tmp_path / "defaults.toml").write_text("[default_versions\n")
        c.reload_models()
        assert srv.wait_for("defaults_file_error")


def test_the_command_line_mark_wins_over_the_file(tmp_path):
    old = write_artifact(tmp_path, "arm-a", seed=0)
    time.sleep(0.05)
    new = write_artifact(tmp_path, "arm-b", seed=1)
    _defaults_file(tmp_path, new)
    with ServerProcess(tmp_path, "--default", f"{MODEL}={old}") as srv:
        c = cl.Client(srv.target, timeout=30)
        assert _default(c) == (old, "marked by --default")
        assert c.value(MODEL, STATE).version == old
        p = subprocess.run([sys.executable, "-m", "stateworth", "query", "--target", srv.target, "models"],
                           capture_output=True, text=True, timeout=60)
        assert p.returncode == 0, p.stderr
        assert f"default {old} (marked by --default)" in p.stdout and new in p.stdout
