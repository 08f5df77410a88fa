"""Whole simulated runs: determinism, schedule, truth files, read-back through the readers."""

from __future__ import annotations

import dataclasses
import hashlib
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from pipeline.errors import ConfigError, IsogapError
from pipeline.io import find_inputs, read_file
from pipeline.io.simrun import TRUTH_HEIGHT_RESOLUTION_M, format_run_toml, write_run
from pipeline.model import parse_time
from pipeline.simulate import preset, simulate_run
from pipeline.stages.barrier import apparent_barrier_map

SAMPLE_DIR = Path(__file__).resolve().parents[1] / "sample_scans" / "night-01"
#: The seed the shipped sample run was made with (sample_scans/README.md).
SAMPLE_SEED = 20260314


def _hashes(folder: Path) -> dict[str, str]:
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def test_tiny_run_is_deterministic_and_seed_dependent():
    files1, truth1 = simulate_run(preset("tiny"), seed=3)
    files2, truth2 = simulate_run(preset("tiny"), seed=3)
    files3, _ = simulate_run(preset("tiny"), seed=4)
    assert [f.name for f in files1] == [f.name for f in files2]
    for a, b in zip(files1, files2, strict=True):
        xr.testing.assert_identical(a.dataset, b.dataset)
    assert format_run_toml(truth1) == format_run_toml(truth2)  # (NaN != NaN in dicts)
    first = next(f for f in files1 if f.name.endswith(".nc") and "frame" in f.name)
    other = next(f for f in files3 if f.name == first.name)
    assert not np.array_equal(first.dataset["z"].values, other.dataset["z"].values)


def test_written_files_are_bit_identical_for_a_seed(tmp_path):
    a = write_run(tmp_path / "a", preset("tiny"), seed=11)
    b = write_run(tmp_path / "b", preset("tiny"), seed=11)
    c = write_run(tmp_path / "c", preset("tiny"), seed=12)
    assert _hashes(a) == _hashes(b)
    ha, hc = _hashes(a), _hashes(c)
    assert ha.keys() == hc.keys() and ha != hc


def test_schedule_times_windows_and_slow_directions():
    spec = preset("tiny").replace(n_constant_current=4, window_moves=((2, 3e-9, -1e-9),),
                                  n_constant_height=1, n_curve_files=1)
    files, truth = simulate_run(spec, seed=1)
    frames = truth["frames"]
    t0 = parse_time(truth["run_start_time"])
    starts = [parse_time(f["start_time"]) for f in frames]
    # files follow one another in time, each frame's offset is its start minus the run start
    assert starts == sorted(starts)
    for f, s in zip(frames, starts, strict=True):
        assert f["time_offset_s"] == pytest.approx((s - t0).total_seconds(), abs=1e-9)
    main = [f for f in frames if f["frame_kind"] == "constant-current"]
    assert [f["slow_direction"] for f in main] == ["increasing", "decreasing"] * 2
    assert [(f["center_x_m"], f["center_y_m"]) for f in main] == [
        (0.0, 0.0), (0.0, 0.0), (3e-9, -1e-9), (3e-9, -1e-9)]
    # a constant-height frame lies inside the main window of its time
    chf = next(f for f in frames if f["mode"] == "constant-height")
    assert abs(chf["center_x_m"]) + 0.5 * chf["scan_size_x_m"] <= 0.5 * spec.scan_size_m + 3e-9
    # file names: shared sequence number in time order
    names = [f.name for f in files if not f.name.startswith("truth/")]
    assert names == sorted(names, key=lambda n: int(n.split("_")[1].split(".")[0]))


def test_truth_attrs_match_run_truth_and_crystal():
    files, truth = simulate_run(preset("tiny"), seed=2)
    a = 4.078e-10
    # crystal geometry: fcc(111) monatomic step a/√3, surface lattice a/√2
    assert truth["step_height_m"] == pytest.approx(a / math.sqrt(3), rel=1e-12)
    assert truth["surface_lattice_m"] == pytest.approx(a / math.sqrt(2), rel=1e-12)
    vx, vy = truth["drift_velocity_x_m_per_s"], truth["drift_velocity_y_m_per_s"]
    assert truth["drift_speed_nm_per_min"] == pytest.approx(math.hypot(vx, vy) * 6e10)
    per_frame = [f for f in files if f.format == "truth"]
    assert len(per_frame) == len(truth["frames"])
    for f in per_frame:
        assert f.dataset.attrs["drift_velocity_x_m_per_s"] == vx
        assert f.dataset.attrs["phi_eV"] == truth["phi_eV"]


def test_write_run_refuses_to_overwrite(tmp_path):
    out = write_run(tmp_path / "run", preset("tiny"), seed=1)
    with pytest.raises(IsogapError, match="exists and is not empty; pass overwrite=True"):
        write_run(out, preset("tiny"), seed=2)
    write_run(out, preset("tiny"), seed=2, overwrite=True)
    assert tomllib.loads((out / "truth" / "run.toml").read_text())["seed"] == 2
    other = tmp_path / "mine"
    other.mkdir()
    (other / "notes.txt").write_text("keep me")
    with pytest.raises(IsogapError, match="not a simulated run; refusing to replace it"):
        write_run(other, preset("tiny"), seed=1, overwrite=True)
    assert (other / "notes.txt").read_text() == "keep me"
    assert not [p for p in tmp_path.iterdir() if p.name.startswith(".")]  # no staging left


def test_written_run_reads_back_through_the_readers(tmp_path):
    out = write_run(tmp_path / "run", preset("tiny"), seed=5)
    files, truth = simulate_run(preset("tiny"), seed=5)
    by_name = {f.name: f for f in files}
    inputs = find_inputs(out)
    data_names = sorted(f.name for f in files if f.format != "truth")
    assert sorted(p.name for p in inputs) == data_names
    for p in inputs:
        ds = read_file(p)
        src = by_name[p.name].dataset
        for var in src.data_vars:
            expected = src[var].values.astype(np.float64)
            if src[var].attrs.get("units") == "V":
                expected = expected * src.attrs["piezo_z_m_per_V"]
            np.testing.assert_array_equal(ds[var].values, expected)
    run = tomllib.loads((out / "truth" / "run.toml").read_text())
    assert run["phi_eV"] == truth["phi_eV"] and len(run["frames"]) == len(truth["frames"])
    for rec in run["frames"]:
        t = xr.open_dataset(out / "truth" / f"{rec['frame_id']}.nc", engine="h5netcdf")
        mem = by_name[f"truth/{rec['frame_id']}.nc"].dataset
        with t:
            # packed truth maps decode to within half the packing resolution (1 fm)
            err = np.abs(t["height_true"].values - mem["height_true"].values).max()
            assert err <= 0.5 * TRUTH_HEIGHT_RESOLUTION_M * (1 + 1e-6)
            np.testing.assert_array_equal(t["terrace_label"].values, mem["terrace_label"].values)


def test_sample_preset_size_and_contents(tmp_path):
    out = write_run(tmp_path / "night", preset("sample"), seed=SAMPLE_SEED)
    total = sum(p.stat().st_size for p in out.rglob("*") if p.is_file())
    assert total <= 3_000_000
    inputs = find_inputs(out)
    kinds = [read_file(p) for p in inputs]
    frames = [d for d in kinds if d.attrs["kind"] == "frame"]
    curves = [d for d in kinds if d.attrs["kind"] == "curve"]
    modes = [d.attrs["mode"] for d in frames]
    assert modes.count("constant-current") == 9 and modes.count("constant-height") == 2
    assert sorted(c.sizes["curve"] for c in curves) == [8, 8, 16]  # two sets + one 4 x 4 grid
    assert {p.suffix for p in inputs} == {".nc", ".npz", ".txt"}
    run = tomllib.loads((out / "truth" / "run.toml").read_text())
    # drift about 0.5 nm/min (the sample scenario)
    assert 0.4 < run["drift_speed_nm_per_min"] < 0.6


def test_shipped_sample_matches_its_regeneration_command(tmp_path):
    if not (SAMPLE_DIR / "truth" / "run.toml").is_file():
        pytest.fail(f"the shipped sample run {SAMPLE_DIR} is missing")
    out = write_run(tmp_path / "night-01", preset("sample"), seed=SAMPLE_SEED)
    assert _hashes(out).keys() == _hashes(SAMPLE_DIR).keys()
    # Values, not bytes: numpy's SIMD exp/cos may differ in the last bit between CPUs, which
    # can flip a float32 rounding (relative 6e-8; numpy float32 machine epsilon 1.19e-7).
    for p in find_inputs(SAMPLE_DIR):
        new, old = read_file(out / p.name), read_file(p)
        assert sorted(new.data_vars) == sorted(old.data_vars)
        for var in old.data_vars:
            np.testing.assert_allclose(new[var].values, old[var].values, rtol=2.4e-7, atol=0)
        assert _same_attrs(new, old, skip={"source_file", "source_sha256"})
    for p in sorted((SAMPLE_DIR / "truth").glob("*.nc")):
        with (xr.open_dataset(p, engine="h5netcdf") as old,
              xr.open_dataset(out / "truth" / p.name, engine="h5netcdf") as new):
            for var in old.data_vars:
                np.testing.assert_allclose(new[var].values, old[var].values, rtol=1e-12,
                                           atol=2 * TRUTH_HEIGHT_RESOLUTION_M)
    new_run = tomllib.loads((out / "truth" / "run.toml").read_text())
    old_run = tomllib.loads((SAMPLE_DIR / "truth" / "run.toml").read_text())
    new_num, new_other = _flat(new_run)
    old_num, old_other = _flat(old_run)
    assert new_other == old_other
    assert new_num == pytest.approx(old_num, rel=1e-12, nan_ok=True)


def _flat(tree, prefix="", num=None, other=None):
    """Nested TOML data -> ({path: number}, {path: str or bool})."""
    num = {} if num is None else num
    other = {} if other is None else other
    if isinstance(tree, dict):
        for k, v in tree.items():
            _flat(v, f"{prefix}/{k}", num, other)
    elif isinstance(tree, list):
        for i, v in enumerate(tree):
            _flat(v, f"{prefix}[{i}]", num, other)
    elif isinstance(tree, str | bool):
        other[prefix] = tree
    else:
        num[prefix] = float(tree)
    return num, other


def _same_attrs(new, old, skip) -> bool:
    for k in set(old.attrs) - skip:
        a, b = new.attrs.get(k), old.attrs[k]
        if isinstance(b, str):
            if a != b:
                return False
        elif not np.allclose(np.asarray(a, float), np.asarray(b, float), rtol=1e-12):
            return False
    return set(new.attrs) - skip == set(old.attrs) - skip


def _grid_record(truth: dict) -> dict:
    (rec,) = [c for c in truth["curves"] if c.get("on_grid")]
    return rec


def _assert_regular_grid(px, py, *, nx: int, ny: int, pitch: float, center: tuple) -> None:
    """Positions row by row (x fastest) on an ``ny × nx`` grid of ``pitch`` around ``center``."""
    px = np.asarray(px, float).reshape(ny, nx)
    py = np.asarray(py, float).reshape(ny, nx)
    tol = 1e-6 * pitch  # float round-off of sums of nm-sized numbers
    np.testing.assert_allclose(np.diff(px, axis=1), pitch, rtol=0, atol=tol)
    np.testing.assert_allclose(np.diff(py, axis=0), pitch, rtol=0, atol=tol)
    # columns share x, rows share y
    np.testing.assert_allclose(px, np.broadcast_to(px[:1], (ny, nx)), rtol=0, atol=tol)
    np.testing.assert_allclose(py, np.broadcast_to(py[:, :1], (ny, nx)), rtol=0, atol=tol)
    assert px.mean() == pytest.approx(center[0], abs=tol)
    assert py.mean() == pytest.approx(center[1], abs=tol)


def test_curve_grid_positions_and_true_barrier_patch():
    # a non-square grid, so that nx (columns, along x) and ny (rows, along y) cannot be swapped
    spec = preset("tiny").replace(curve_grid_files=1, curve_grid_shape=(4, 3),
                                  curve_grid_pitch_m=0.8e-9, curve_grid_phi_step_eV=-0.7)
    files, truth = simulate_run(spec, seed=9)
    rec = _grid_record(truth)
    ds = next(f.dataset for f in files if f.name == rec["file"])
    assert ds.sizes["curve"] == rec["n_curves"] == 12
    center = (rec["grid_center_x_m"], rec["grid_center_y_m"])
    _assert_regular_grid(ds.attrs["position_x_m"], ds.attrs["position_y_m"], nx=4, ny=3,
                         pitch=0.8e-9, center=center)
    np.testing.assert_array_equal(rec["position_x_m"], ds.attrs["position_x_m"])
    # the grid lies inside the main window of its time (tiny: 12 nm frames, no window moves)
    half = 0.5 * spec.scan_size_m
    assert np.all(np.abs(ds.attrs["position_x_m"]) < half)
    assert np.all(np.abs(ds.attrs["position_y_m"]) < half)
    # true barrier per node: phi_eV left of the grid centre, phi_eV + step right of it
    phi = np.asarray(rec["phi_eV"]).reshape(3, 4)
    np.testing.assert_array_equal(phi[:, :2], 4.6)
    np.testing.assert_allclose(phi[:, 2:], 4.6 - 0.7, rtol=1e-15)
    # the ordinary curve file of the tiny preset is still there and unchanged in size
    assert [c["n_curves"] for c in truth["curves"] if not c.get("on_grid")] == [4]


def test_shipped_grid_file_positions_form_the_requested_grid():
    run = tomllib.loads((SAMPLE_DIR / "truth" / "run.toml").read_text())
    rec = _grid_record(run)
    spec = preset("sample")
    nx, ny = spec.curve_grid_shape
    assert (nx, ny) == (rec["grid_nx"], rec["grid_ny"]) == (4, 4)
    ds = read_file(SAMPLE_DIR / rec["file"])
    assert ds.sizes["curve"] == 16
    _assert_regular_grid(ds.attrs["position_x_m"], ds.attrs["position_y_m"], nx=nx, ny=ny,
                         pitch=spec.curve_grid_pitch_m,
                         center=(rec["grid_center_x_m"], rec["grid_center_y_m"]))


@pytest.mark.parametrize("source", ["shipped", "tiny-seed-21"])
def test_barrier_map_of_the_curve_grid_recovers_the_true_barrier(source):
    if source == "shipped":
        run = tomllib.loads((SAMPLE_DIR / "truth" / "run.toml").read_text())
        rec = _grid_record(run)
        ds = read_file(SAMPLE_DIR / rec["file"])  # through the readers, as the batch does
        step = preset("sample").curve_grid_phi_step_eV
    else:
        step = -0.4
        spec = preset("tiny").replace(curve_grid_files=1, curve_grid_phi_step_eV=step,
                                      curve_samples=200, curve_tip_change_fraction=0.125)
        files, truth = simulate_run(spec, seed=21)
        rec = _grid_record(truth)
        ds = next(f.dataset for f in files if f.name == rec["file"])
    m = apparent_barrier_map(ds)
    assert m.sizes == {"y": 4, "x": 4}
    # node of each curve on the map
    ix = np.abs(m.x.values[None, :] - np.asarray(rec["position_x_m"])[:, None]).argmin(axis=1)
    iy = np.abs(m.y.values[None, :] - np.asarray(rec["position_y_m"])[:, None]).argmin(axis=1)
    assert len(set(zip(iy.tolist(), ix.tolist(), strict=True))) == 16  # one curve per node
    phi_fit = m.phi_ap_eV.values[iy, ix].astype(float)
    sigma = m.phi_ap_uncertainty_eV.values[iy, ix].astype(float)
    # truth: simulator ground truth (truth/run.toml [[curves]] phi_eV per curve; the
    # exponential curve model makes the apparent barrier equal to it)
    phi_true = np.asarray(rec["phi_eV"], float)
    accepted = m.accepted.values[iy, ix].astype(bool)
    # the fit rejects tip-change curves (2 of 16 here) and should keep the others
    assert np.all(~accepted[np.asarray(rec["tip_change"])])
    assert accepted.sum() >= 12
    # uncertainties small enough for the 3-sigma check to mean something: the barrier patch
    # step (0.4-0.5 eV) is > 10 sigma
    assert np.all((sigma[accepted] > 1e-3) & (sigma[accepted] < 0.04))
    within = np.abs(phi_fit - phi_true) <= 3.0 * sigma
    assert (within & accepted).sum() >= 12
    # the map shows the patch: right-hand columns lower by |step|
    right = np.asarray(rec["position_x_m"]) > rec["grid_center_x_m"]
    d = (np.nanmedian(np.where(accepted & right, phi_fit, np.nan))
         - np.nanmedian(np.where(accepted & ~right, phi_fit, np.nan)))
    assert d == pytest.approx(step, abs=0.05)


@pytest.mark.parametrize(
    ("changes", "match"),
    [({"formats": ("tif",)}, "formats = \\('tif',\\); need >= 1 value"),
     ({"curve_formats": ("txt",)}, "a text grid cannot hold curves"),
     ({"nx": 4}, "nx = 4; at least 8 pixels"),
     ({"window_moves": ((9, 1e-9, 0.0),)}, "frame indices must be in 0..2"),
     ({"phi_eV": -1.0}, "phi_eV = -1.0; must be a positive finite number"),
     ({"start_time": "tonight"}, "is not an ISO 8601 time"),
     ({"curve_grid_shape": (1, 4)}, "curve_grid_shape = \\(1, 4\\); expected \\(nx, ny\\)"),
     ({"curve_grid_files": 1, "curve_grid_pitch_m": 4e-9},
      "curve_grid_pitch_m = 4e-09; the grid \\(4 nodes"),
     ({"curve_grid_phi_step_eV": -4.3}, "phi_eV \\+ step = 0.3 eV; must be finite and > 0.5"),
     ({"curve_grid_files": -1}, "curve_grid_files = -1; must be >= 0")])
def test_bad_run_specs_raise(changes, match):
    with pytest.raises(IsogapError, match=match):
        preset("tiny").replace(**changes)


def test_unknown_preset():
    with pytest.raises(ConfigError, match="unknown simulation preset 'huge'; choose one of"):
        preset("huge")


def test_run_spec_is_frozen_and_main_frames_show_terraces():
    spec = preset("tiny")
    with pytest.raises(dataclasses.FrozenInstanceError):
        spec.nx = 3  # type: ignore[misc]
    files, truth = simulate_run(spec, seed=0)
    # 6 nm terraces over the tiny run's ~30 nm extent
    assert 3 <= len(truth["steps"]) <= 8
    for f in files:
        if f.format == "truth" and f.dataset.attrs["frame_kind"] == "constant-current":
            labels = np.unique(f.dataset["terrace_label"].values)
            # steps ~1 main-frame width apart: every main frame shows at least two terraces
            assert labels.size >= 2 and np.all(np.diff(labels) == 1)
