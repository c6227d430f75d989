"""Shared fixtures. Tests keep models small: JAX compiles dominate the suite's time."""

from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE_SPEC = ROOT / "examples" / "fitness.toml"


@pytest.fixture(scope="session")
def example_spec_path() -> Path:
    return EXAMPLE_SPEC


@pytest.fixture(scope="session")
def example_model():
    from stateworth.rules import compile_model, load_spec
    return compile_model(load_spec(EXAMPLE_SPEC), source=str(EXAMPLE_SPEC))
