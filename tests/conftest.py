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
def au_frame():
    """A function: simulated 256² Au(111)-like frame (100 nm) as the height stage hands it on.

    ``au_frame(seed, normal_deg=..., ...)``: step edges at ``step_offsets_m`` with their
    normals at ``normal_deg`` from the fast axis (90° = edges along it), 12 adsorbates, 3 pm z
    noise, white line offsets, optionally drift, a plane tilt and a tip change of ``tip_m``
    from ``tip_row`` on (the frame of ``benchmarks/sweep_tip_changes.py``).
    """
    from datetime import datetime

    import numpy as np

    from pipeline.model import make_height_frame, validate_raw_frame
    from pipeline.simulate import Adsorbate, Step, Surface, simulate_constant_current_frame

    def make(seed: int, *, normal_deg: float, tip_row: int | None = None, tip_m: float = 0.0,
             line_offsets_m: float = 20e-12, step_offsets_m: tuple = (-20e-9, 10e-9),
             drift: bool = True, slopes: tuple = (5e-3, -3e-3)):
        rng = np.random.default_rng(seed)
        steps = tuple(Step(offset_m=o, angle_deg=normal_deg, levels=1) for o in step_offsets_m)
        ads = tuple(Adsorbate(float(px), float(py), 1.5e-10, 6e-10)
                    for px, py in rng.uniform(-45e-9, 45e-9, (12, 2)))
        surf = Surface(lattice_constant_m=4.078e-10, steps=steps, corrugation_m=20e-12,
                       corrugation_angle_deg=12.0, adsorbates=ads, slope_x=slopes[0],
                       slope_y=slopes[1])
        kw: dict = {"tip_change_row": tip_row, "tip_change_m": tip_m} if tip_row is not None \
            else {}
        if drift:
            kw["drift_velocity_m_per_s"] = (0.42e-9 / 60, -0.27e-9 / 60)
        raw, _ = simulate_constant_current_frame(
            surf, rng=rng, phi_eV=4.5, setpoint_A=1e-10, bias_V=0.5, nx=256, ny=256,
            size_x_m=100e-9, line_time_s=0.1, start_time=datetime(2031, 5, 4, 22, 0, 0),
            z_noise_m=3e-12, line_offsets_m=line_offsets_m, backward=False, **kw)
        raw = validate_raw_frame(raw)
        return make_height_frame(raw, raw["z"].values,
                                 uncertainty=np.full(raw["z"].shape, 3e-12))

    return make


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
