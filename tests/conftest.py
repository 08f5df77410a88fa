"""Shared fixtures: one small simulated run, made once per test session."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from pipeline.config import Config, parse_config


@pytest.fixture(scope="session")
def tiny_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small synthetic run (simulator preset ``tiny``) with its ground truth in ``truth/``."""
    from pipeline.io.simrun import write_run
    from pipeline.simulate import preset

    out = tmp_path_factory.mktemp("tiny") / "run"
    write_run(out, preset("tiny"), seed=3)
    return out


@pytest.fixture
def run_copy(tiny_run: Path, tmp_path: Path) -> Path:
    """A private copy of the tiny run that a test may modify."""
    dst = tmp_path / "run"
    shutil.copytree(tiny_run, dst)
    return dst


@pytest.fixture(scope="session")
def serial_config() -> Config:
    """Defaults, but one process: fast and deterministic for tests."""
    return parse_config({"run": {"executor": "serial"}})


@pytest.fixture(scope="session")
def tiny_store(tiny_run: Path, tmp_path_factory: pytest.TempPathFactory, serial_config: Config):
    """The tiny run processed once with the serial executor: (store path, summary)."""
    from pipeline.batch import run_batch

    store = tmp_path_factory.mktemp("store") / "tiny.h5"
    summary = run_batch(tiny_run, store, serial_config)
    return store, summary
