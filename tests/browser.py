"""Headless Chromium for the report tests: find it (or install Debian's package), load a page, and
report for every <img> whether it loaded (naturalWidth > 0), with the page's text as Chromium
laid it out (``innerText``: what a reader sees, hidden elements left out).

Where Chromium is missing and cannot be installed (not root, no apt-get, no network to the
package registry) the calling test is skipped with a message that says so and how to fix it.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import tempfile
from pathlib import Path

import pytest

NAMES = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--disable-dev-shm-usage"]
_CHECK = """
<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var out = imgs.map(function (im) {
    return {id: im.id || '', complete: im.complete, width: im.naturalWidth, height: im.naturalHeight};
  });
  var text = document.body.innerText;
  var pre = document.createElement('pre');
  pre.id = 'stateworth-image-check';
  pre.textContent = JSON.stringify({images: out, text: text});
  document.body.appendChild(pre);
});
</script>
"""


def find_chromium() -> str | None:
    for n in NAMES:
        p = shutil.which(n)
        if p:
            return p
    return None


def ensure_chromium() -> str:
    """The Chromium binary; installs Debian's ``chromium`` when missing and possible, else skips."""
    found = find_chromium()
    if found:
        return found
    if not hasattr(os, "geteuid") or os.geteuid() != 0 or not shutil.which("apt-get"):
        pytest.skip("headless Chromium is not installed and cannot be installed here (needs root and apt-get); "
                    "install Debian's 'chromium' package to run the report rendering tests")
    env = dict(os.environ, DEBIAN_FRONTEND="noninteractive")
    try:
        subprocess.run(["apt-get", "update", "-q"], env=env, capture_output=True, timeout=300, check=True)
        subprocess.run(["apt-get", "install", "-y", "-q", "--no-install-recommends", "chromium"], env=env,
                       capture_output=True, timeout=900, check=True)
    except (subprocess.SubprocessError, OSError) as e:
        pytest.skip(f"headless Chromium is missing and `apt-get install chromium` failed ({e.__class__.__name__}); "
                    "no network to the package registry? install it by hand to run these tests")
    found = find_chromium()
    if not found:
        pytest.skip("apt-get installed 'chromium' but no chromium binary is on PATH")
    return found


def image_check(page: Path, binary: str | None = None, timeout: float = 120.0) -> list[dict]:
    """Load ``page`` (a copy with a checking script appended, in the same folder so relative
    links resolve) in headless Chromium; return one ``{id, complete, width, height}`` per image."""
    return render(page, binary, timeout)["images"]


def render(page: Path, binary: str | None = None, timeout: float = 120.0) -> dict:
    """Load ``page`` in headless Chromium: ``{"images": [{id, complete, width, height}, ...],
    "text": the page's visible text}``."""
    binary = binary or ensure_chromium()
    page = Path(page).resolve()
    text = page.read_text(encoding="utf-8")
    probe = page.with_name(f".probe-{page.name}")
    probe.write_text(text.replace("</body>", _CHECK + "</body>") if "</body>" in text else text + _CHECK,
                     encoding="utf-8")
    profile = tempfile.mkdtemp(prefix="stateworth-chromium-")
    try:
        proc = subprocess.run([binary, *FLAGS, f"--user-data-dir={profile}", "--virtual-time-budget=10000",
                               "--dump-dom", probe.as_uri()], capture_output=True, text=True, timeout=timeout)
    finally:
        probe.unlink(missing_ok=True)
        shutil.rmtree(profile, ignore_errors=True)
    m = re.search(r'<pre id="stateworth-image-check">(.*?)</pre>', proc.stdout, re.S)
    if not m:
        raise AssertionError(f"Chromium did not run the check script (exit {proc.returncode}); "
                             f"stderr tail: {proc.stderr[-800:]}")
    import html as _html
    return json.loads(_html.unescape(m.group(1)))
