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
