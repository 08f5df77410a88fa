"""End-to-end runs on a simulated run: store contract, bad inputs, resume, executors."""

from __future__ import annotations

import json
import shutil
import tomllib
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from pipeline.batch import run_batch
from pipeline.config import parse_config
from pipeline.io.store import open_store

FRAME_ATTRS = ("mode", "source_file", "source_sha256", "start_time", "work_function_eV",
               "status", "warnings", "processing_history")
RUN_ATTRS = ("work_function_eV", "work_function_uncertainty_eV", "barrier_method",
             "drift_velocity_x_m_per_s", "drift_velocity_y_m_per_s", "config_toml",
             "config_sha256")



def test_store_contract_end_to_end(tiny_run, tiny_store):
    store, summary = tiny_store
    assert summary.exit_code == 0, summary.failures
    n_frames = sum(1 for p in (tiny_run / "truth").glob("*.nc"))
    assert summary.n_frames == n_frames > 0
    root = xr.open_dataset(store, engine="h5netcdf")
    assert root.attrs["Conventions"] == "CF-1.10"  # DESIGN.md §4 root attributes
    for key in ("title", "software", "created", "history"):
        assert root.attrs[key], key
    failures = xr.open_dataset(store, group="failures", engine="h5netcdf")
    assert failures.sizes.get("failure", 0) == 0
    st = open_store(store)
    n_terraced = 0
    for fid in st.frame_ids:
        ds = xr.open_dataset(store, group=f"frames/{fid}", engine="h5netcdf")
        assert ds["height"].attrs["units"] == "m"
        assert ds["height"].dims == ("y", "x")
        assert ds["x"].attrs["units"] == "m" and ds["y"].attrs["units"] == "m"
        assert ds["flags"].dtype == np.uint8 and "flag_meanings" in ds["flags"].attrs
        for key in FRAME_ATTRS:
            assert key in ds.attrs, (fid, key)
        assert ds.attrs["status"] in ("ok", "flagged")
        assert ds["height_uncertainty"].attrs["units"] == "m"
        assert list(ds["flags"].attrs["flag_masks"]) == [1, 2, 4, 8, 16, 32, 64, 128]
        if "step_height_m" in ds.attrs:
            n_terraced += 1
            assert 0 < ds.attrs["step_height_uncertainty_m"] < ds.attrs["step_height_m"]
        history = json.loads(ds.attrs["processing_history"])
        assert history[0]["stage"] == "reconstruct_height"
        assert len(ds.attrs["source_sha256"]) == 64
    assert n_terraced >= 2  # the tiny run's constant-current frames cross steps
    run = xr.open_dataset(store, group="run", engine="h5netcdf")
    for key in RUN_ATTRS:
        assert key in run.attrs, key
    cfg = parse_config(tomllib.loads(run.attrs["config_toml"]))
    assert cfg.run.executor == "serial"


def test_work_function_matches_simulated_truth(tiny_run, tiny_store):
    store, _ = tiny_store
    truth = tomllib.loads((tiny_run / "truth" / "run.toml").read_text())
    run = open_store(store).run()
    phi, sigma = run.attrs["work_function_eV"], run.attrs["work_function_uncertainty_eV"]
    # simulator ground truth; within 0.05 eV is the barrier issue's acceptance bound
    assert abs(phi - truth["phi_eV"]) < max(0.05, 4 * sigma)


def test_bad_files_are_recorded_and_good_ones_finish(run_copy, serial_config, tmp_path):
    good = sorted(run_copy.glob("frame_*.nc"))[0]
    (run_copy / "truncated.nc").write_bytes(good.read_bytes()[:2000])
    (run_copy / "garbage.nc").write_bytes(b"this is not HDF5" * 10)
    (run_copy / "orphan.toml").write_text('kind = "frame"\n')
    store = tmp_path / "mixed.h5"
    summary = run_batch(run_copy, store, serial_config)
    assert summary.exit_code == 1
    failed = {Path(f.file).name for f in open_store(store).failures()}
    assert {"truncated.nc", "garbage.nc", "orphan.toml"} <= failed
    assert summary.n_frames == len(list((run_copy / "truth").glob("*.nc")))
    for f in open_store(store).failures():
        assert Path(f.file).name in f.message  # each message names its file


def test_rerun_resumes_and_changed_config_recomputes(run_copy, serial_config, tmp_path, heights):
    store = tmp_path / "s.h5"
    first = run_batch(run_copy, store, serial_config)
    h1 = heights(store)
    again = run_batch(run_copy, store, serial_config)
    assert again.n_reused == first.n_frames
    h2 = heights(store)
    assert h1.keys() == h2.keys()
    for k in h1:
        np.testing.assert_array_equal(h1[k], h2[k])
    changed = parse_config({"run": {"executor": "serial"}, "level": {"method": "polynomial"}})
    third = run_batch(run_copy, store, changed)
    assert third.n_reused == 0


def test_rerun_registers_only_new_drift_pairs(run_copy, serial_config, tmp_path):
    """Drift-pair results are staged by what they depend on: a rerun measures none again and
    gives the same drift table; a changed frame re-measures only the pair(s) it belongs to."""
    store = tmp_path / "s.h5"

    def drift_tasks(events):
        return [e.total for e in events if e.kind == "pass" and e.name == "drift"]

    first_events, again_events, edit_events = [], [], []
    run_batch(run_copy, store, serial_config, on_event=first_events.append)
    table1 = open_store(store).run()
    run_batch(run_copy, store, serial_config, on_event=again_events.append)
    n_pairs = drift_tasks(first_events)[0]
    assert n_pairs >= 2 and drift_tasks(again_events) == [0]
    xr.testing.assert_identical(open_store(store).run(), table1)
    # the run's first frame changes: the one pair it starts is measured again, no other
    first = run_copy / "frame_001.nc"
    with xr.open_dataset(first, engine="h5netcdf") as ds:
        edited = ds.load()
    edited["current"] = edited["current"] * (1 + 1e-6)
    first.unlink()
    edited.to_netcdf(first, engine="h5netcdf")
    run_batch(run_copy, store, serial_config, on_event=edit_events.append)
    assert drift_tasks(edit_events) == [1]


def test_rerun_reuses_the_curve_fits(run_copy, serial_config, tmp_path, monkeypatch):
    """Curve fits are staged by file content and fit settings: a rerun fits nothing again
    and writes the same run group; changed fit settings fit again."""
    store = tmp_path / "s.h5"
    run_batch(run_copy, store, serial_config)
    run1 = open_store(store).run()

    def no_fitting(*args, **kwargs):
        raise AssertionError("curves fitted again")

    monkeypatch.setattr("pipeline.tasks.fit_curves", no_fitting)
    again = run_batch(run_copy, store, serial_config)
    assert not again.failures
    xr.testing.assert_identical(open_store(store).run(), run1)
    changed = parse_config({"run": {"executor": "serial"},
                            "barrier": {"min_points": 9}})
    third = run_batch(run_copy, store, changed)
    assert [f.stage for f in third.failures] == ["fit_curves"]  # fitted again: refused here


def test_finished_frames_go_straight_into_the_store(tiny_store):
    # without a lateral scale to measure, nothing is staged after the finishing pass
    store, summary = tiny_store
    assert summary.n_frames > 0
    assert not (store.with_name(store.name + ".parts") / "final").exists()


def test_process_pool_matches_serial(tiny_run, tiny_store, tmp_path, heights):
    store, _ = tiny_store
    cfg = parse_config({"run": {"executor": "processes", "workers": 2}})
    other = tmp_path / "p.h5"
    run_batch(tiny_run, other, cfg)
    a, b = heights(store), heights(other)
    assert a.keys() == b.keys()
    for k in a:
        np.testing.assert_array_equal(a[k], b[k])


@pytest.mark.slow
def test_dask_local_cluster_matches_serial(tiny_run, tiny_store, tmp_path, heights):
    distributed = pytest.importorskip("distributed")
    store, _ = tiny_store
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        cfg = parse_config({"run": {"executor": "dask",
                                    "scheduler_address": cluster.scheduler_address}})
        other = tmp_path / "d.h5"
        summary = run_batch(tiny_run, other, cfg)
    assert summary.exit_code == 0
    a, b = heights(store), heights(other)
    assert a.keys() == b.keys()
    for k in a:
        np.testing.assert_array_equal(a[k], b[k])


def test_empty_folder_gives_empty_store(tmp_path, serial_config):
    (tmp_path / "empty").mkdir()
    summary = run_batch(tmp_path / "empty", tmp_path / "e.h5", serial_config)
    assert summary.n_frames == 0 and summary.exit_code == 0
    assert open_store(tmp_path / "e.h5").frame_ids == []


def test_duplicate_frame_ids_second_is_a_failure(run_copy, serial_config, tmp_path):
    first = sorted(run_copy.glob("frame_*.nc"))[0]
    sub = run_copy / "copy"
    sub.mkdir()
    shutil.copy(first, sub / first.name)
    cfg = parse_config({"run": {"executor": "serial"}, "input": {"recursive": True}})
    summary = run_batch(run_copy, tmp_path / "s.h5", cfg)
    msgs = [f.message for f in summary.failures]
    assert any("is already used by" in m for m in msgs), msgs


def test_edited_sidecar_is_recomputed_and_resume_keeps_z_calibration(run_copy, tmp_path):
    cfg = parse_config({"run": {"executor": "serial"},
                        "calibrate": {"known_step_height_m": 2.3544e-10}})
    store = tmp_path / "s.h5"
    run_batch(run_copy, store, cfg)
    first = open_store(store).run().attrs["z_scale_factor"]
    side = next(run_copy.glob("frame_*.toml"))
    side.write_text(side.read_text() + "\n# edited by the operator\n")
    again = run_batch(run_copy, store, cfg)
    # the frame whose sidecar changed is recomputed, the others are reused
    assert again.n_reused == again.n_frames - 1
    # a resumed run still calibrates z from the steps of reused frames
    assert open_store(store).run().attrs["z_scale_factor"] == pytest.approx(first, rel=1e-9)


def test_mixed_time_zones_fail_the_odd_frame_only(run_copy, serial_config, tmp_path):
    import xarray as xr

    from pipeline.io.writers import write_raw_netcdf

    victim = sorted(run_copy.glob("frame_*.nc"))[0]
    with xr.open_dataset(victim, engine="h5netcdf") as ds:
        ds = ds.load()
    ds.attrs["start_time"] = ds.attrs["start_time"] + "+00:00"
    victim.unlink()
    write_raw_netcdf(ds, victim)
    summary = run_batch(run_copy, tmp_path / "s.h5", serial_config)
    msgs = [f.message for f in summary.failures]
    assert any("time zone, unlike the other frames" in m for m in msgs), msgs
    assert summary.n_frames == len(list((run_copy / "truth").glob("*.nc"))) - 1


def test_only_whole_step_staircases_calibrate_the_z_scale():
    from pipeline.batch.runlevel import calibration_steps

    heads = [
        {"step_height_m": 2.35e-10, "step_height_uncertainty_m": 1e-12,
         "step_levels_consistent": 1},
        {"step_height_m": 7.7e-11, "step_height_uncertainty_m": 1e-12,  # a missed tip change
         "step_levels_consistent": 0},
        {"frame_id": "flat"},  # one terrace: no step
        {"step_height_m": 2.36e-10, "step_height_uncertainty_m": 2e-12},  # before the check
    ]
    assert calibration_steps(heads) == [(2.35e-10, 1e-12), (2.36e-10, 2e-12)]


def test_a_frame_whose_step_disagrees_with_the_run_is_flagged(tmp_path):
    # Four frames of Au(111)-like terraces and one whose staircase is whole multiples of a
    # third of that step (what an undetected 80 pm tip change beside 235 pm steps leaves):
    # on its own it looks fine; against the run it is flagged and calibrates nothing. Truth:
    # the simulator's steps, a/sqrt(3) for the lattice constant given (crystal geometry).
    from datetime import datetime, timedelta

    from pipeline.io.writers import write_raw_netcdf
    from pipeline.simulate import Step, Surface, simulate_constant_current_frame

    a_m = 4.078e-10
    run = tmp_path / "run"
    run.mkdir()
    for k, lattice in enumerate((a_m, a_m, a_m / 3, a_m, a_m)):
        rng = np.random.default_rng(20 + k)
        steps = tuple(Step(offset_m=o, angle_deg=40.0 + 7 * k, levels=1) for o in (-8e-9, 6e-9))
        surf = Surface(lattice_constant_m=lattice, steps=steps, corrugation_m=1e-11)
        raw, _ = simulate_constant_current_frame(
            surf, rng=rng, phi_eV=4.5, setpoint_A=1e-10, bias_V=0.5, nx=128, ny=128,
            size_x_m=40e-9, line_time_s=0.05,
            start_time=datetime(2031, 5, 4, 22, 0, 0) + timedelta(minutes=10 * k),
            z_noise_m=2e-12, backward=False, frame_id=f"f{k}")
        write_raw_netcdf(raw, run / f"f{k}.nc")
    cfg = parse_config({"run": {"executor": "serial"}, "drift": {"enabled": False},
                        "calibrate": {"known_step_height_m": a_m / 3**0.5}})
    store = tmp_path / "run.h5"
    summary = run_batch(run, store, cfg)
    assert not summary.failures
    st = open_store(store)
    status = {fid: st.frame(fid).attrs["status"] for fid in st.frame_ids}
    assert status == {"f0": "ok", "f1": "ok", "f2": "flagged", "f3": "ok", "f4": "ok"}
    odd = st.frame("f2").attrs
    assert odd["step_height_m"] == pytest.approx(a_m / 3**0.5 / 3, rel=0.02)
    assert odd["step_run_deviation_sigma"] > 5
    assert any("disagrees with the run's" in w for w in json.loads(odd["warnings"]))
    run_attrs = xr.open_dataset(store, group="run", engine="h5netcdf").attrs
    # the z scale comes from the four agreeing frames: the simulated piezo is exact
    assert run_attrs["z_scale_factor"] == pytest.approx(1.0, abs=3 * max(
        run_attrs["z_scale_factor_uncertainty"], 1e-3))
    assert run_attrs["step_consensus_m"] == pytest.approx(a_m / 3**0.5, rel=0.01)


def test_the_runs_step_needs_three_frames_and_drops_the_odd_one():
    from pipeline.batch.runlevel import calibration_steps, run_step

    good = [{"step_height_m": s, "step_height_uncertainty_m": 3e-13}
            for s in (2.354e-10, 2.356e-10, 2.355e-10)]
    odd = {"step_height_m": 7.85e-11, "step_height_uncertainty_m": 3e-13}
    assert run_step(good[:2]) is None  # two frames cannot tell which one is wrong
    consensus = run_step([*good, odd])
    assert consensus[0] == 2.354e-10  # weighted median of four equal weights: the lower middle
    assert calibration_steps([*good, odd], consensus) == [
        (a["step_height_m"], 3e-13) for a in good]
    assert len(calibration_steps([*good, odd])) == 4  # without a consensus: all
