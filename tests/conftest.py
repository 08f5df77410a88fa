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
def heights():
    """A function: store path → {frame id: height map} (for comparing runs)."""
    from pipeline.io.store import open_store

    def read(store: Path) -> dict:
        st = open_store(store)
        return {fid: st.frame(fid)["height"].values for fid in st.frame_ids}

    return read


@pytest.fixture(scope="session")
def tiny_store(tiny_run: Path, tmp_path_factory: pytest.TempPathFactory, serial_config: Config):
    """The tiny run processed once with the serial executor: (store path, summary)."""
    from pipeline.batch import run_batch

    store = tmp_path_factory.mktemp("store") / "tiny.h5"
    summary = run_batch(tiny_run, store, serial_config)
    return store, summary


ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="session")
def sample_calibrated(tmp_path_factory: pytest.TempPathFactory):
    """The shipped sample run processed with the worked-example calibration config."""
    import tomllib

    from pipeline.batch import run_batch
    from pipeline.config import load_config, with_run_overrides

    # serial: warnings raised inside stages reach pytest's filter (workers would hide them)
    cfg = with_run_overrides(load_config(ROOT / "configs" / "au111-calibrated.toml"),
                             executor="serial")
    store = tmp_path_factory.mktemp("sample") / "night-01.h5"
    summary = run_batch(ROOT / "sample_scans" / "night-01", store, cfg)
    truth = tomllib.loads((ROOT / "sample_scans" / "night-01" / "truth" / "run.toml").read_text())
    return store, summary, truth
