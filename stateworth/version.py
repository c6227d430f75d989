"""The installed version of stateworth (from the package metadata, one source: pyproject.toml)."""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("stateworth")
except PackageNotFoundError:  # pragma: no cover - running from a tree that was never installed
    __version__ = "0+unknown"
