"""Shared test helpers: the command runner and the recognizer sample beside the project."""

from __future__ import annotations

import importlib.util
import os
import sys
from collections.abc import Sequence
from pathlib import Path
from types import ModuleType

import pytest
from click.testing import Result
from hypothesis import settings
from typer.testing import CliRunner

from rescore.cli import app

ROOT = Path(__file__).resolve().parent.parent
FIXTURES = ROOT / "fixtures"
# Real recognizer N-best lists live in the shared folder beside the project; tests read them
# from there and never copy them in.
SAMPLE = ROOT.parent / "shared" / "data" / "recognizer-sample"

settings.register_profile("default", deadline=None, print_blob=True)
settings.register_profile("fuzz", deadline=None, max_examples=int(
    os.environ.get("RESCORE_FUZZ_EXAMPLES", "20000")))
settings.load_profile("fuzz" if os.environ.get("RESCORE_FUZZ_EXAMPLES") else "default")


def load_script(path: Path) -> ModuleType:
    """A script of scripts/ loaded as a module (its functions called, its main not run)."""
    spec = importlib.util.spec_from_file_location(path.stem, path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look the module up while it loads
    spec.loader.exec_module(module)
    return module


def run(args: Sequence[str | os.PathLike[str]]) -> Result:
    return CliRunner().invoke(app, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture
def sample_dir() -> Path:
    if not SAMPLE.is_dir():
        pytest.skip(f"recognizer sample not found at {SAMPLE}")
    return SAMPLE


# Modules whose tests start real subprocesses, worker pools, a Dask cluster or a browser, or
# run many fuzz examples: `make check` leaves them out (`-m 'not slow'`); `make test` runs all.
SLOW_MODULES = frozenset({"test_report_browser", "test_parallel", "test_memory", "test_fuzz",
                          "test_outputs_cli", "test_wheel",
                          "test_interrupt", "test_progress"})


def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    for item in items:
        if item.path.stem in SLOW_MODULES:
            item.add_marker(pytest.mark.slow)


def full_disk_for(monkeypatch: pytest.MonkeyPatch, module: object, prefix: str) -> None:
    """Send the scratch files that ``module._create`` opens under names beginning with
    ``prefix`` to /dev/full, the kernel's always-full device (every write fails with
    ENOSPC, as on a full disk); skip where it does not exist."""
    if not os.path.exists("/dev/full"):
        pytest.skip("no /dev/full here")
    real = getattr(module, "_create")  # noqa: B009

    def create(path: Path) -> object:
        return open("/dev/full", "wb") if path.name.startswith(prefix) else real(path)

    monkeypatch.setattr(module, "_create", create)
