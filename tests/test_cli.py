"""The command line: exit codes and every error path (typer's CliRunner)."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from pipeline.cli import app
from pipeline.io.store import StoreLock

runner = CliRunner()


def invoke(*args: str):
    return runner.invoke(app, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture
def serial_toml(tmp_path: Path) -> Path:
    p = tmp_path / "serial.toml"
    p.write_text('[run]\nexecutor = "serial"\n')
    return p


def test_process_ok_then_show(tiny_run, tmp_path, serial_toml):
    store = tmp_path / "s.h5"
    r = invoke("process", tiny_run, "--store", store, "--config", serial_toml)
    assert r.exit_code == 0, r.output
    assert "frame(s) in" in r.output
    r = invoke("show", store)
    assert r.exit_code == 0, r.output
    assert "work function" in r.output


def test_process_with_bad_input_exits_1_and_keeps_the_rest(run_copy, tmp_path, serial_toml):
    (run_copy / "broken.nc").write_bytes(b"\x89HDF\r\n\x1a\n" + b"\0" * 100)
    store = tmp_path / "s.h5"
    r = invoke("process", run_copy, "--store", store, "--config", serial_toml, "-q")
    assert r.exit_code == 1
    assert "broken.nc" in r.output
    r = invoke("show", store)
    assert r.exit_code == 0 and "broken.nc" in r.output


def test_process_missing_folder_exits_2(tmp_path):
    r = invoke("process", tmp_path / "nope", "--store", tmp_path / "s.h5")
    assert r.exit_code == 2
    assert "does not exist" in r.output


def test_process_bad_config_exits_2(tiny_run, tmp_path):
    cfg = tmp_path / "bad.toml"
    cfg.write_text("[level]\nmethdo = 'plane'\n")
    r = invoke("process", tiny_run, "--store", tmp_path / "s.h5", "--config", cfg)
    assert r.exit_code == 2
    assert "unknown key 'methdo' in [level] (did you mean 'method'?)" in r.output
    assert not (tmp_path / "s.h5").exists()


def test_process_bad_option_value_exits_2(tiny_run, tmp_path):
    r = invoke("process", tiny_run, "--store", tmp_path / "s.h5", "--executor", "gpu")
    assert r.exit_code == 2
    assert "executor" in r.output


def test_process_locked_store_exits_2_naming_holder(tiny_run, tmp_path, serial_toml):
    store = tmp_path / "s.h5"
    with StoreLock(store):
        r = invoke("process", tiny_run, "--store", store, "--config", serial_toml)
    assert r.exit_code == 2
    assert "another isogap process is writing it (pid" in r.output


def test_process_unwritable_target_exits_2(tiny_run, tmp_path):
    r = invoke("process", tiny_run, "--store", tmp_path / "no" / "dir" / "s.h5")
    assert r.exit_code == 2
    assert "does not exist" in r.output


def test_show_errors(tmp_path):
    r = invoke("show", tmp_path / "missing.h5")
    assert r.exit_code == 2 and "file not found" in r.output
    junk = tmp_path / "junk.h5"
    junk.write_text("hello")
    r = invoke("show", junk)
    assert r.exit_code == 2 and "not a readable HDF5 store" in r.output


def test_config_show_and_check(tmp_path):
    r = invoke("config", "show")
    assert r.exit_code == 0 and "[drift]" in r.output
    good = tmp_path / "good.toml"
    good.write_text("[drift]\nupsample_factor = 50\n")
    r = invoke("config", "check", good)
    assert r.exit_code == 0 and "valid" in r.output
    r = invoke("config", "show", good)
    assert "upsample_factor = 50" in r.output
    bad = tmp_path / "bad.toml"
    bad.write_text("[drift]\nupsample_factor = 0\n")
    r = invoke("config", "check", bad)
    assert r.exit_code == 2 and "drift.upsample_factor" in r.output
    r = invoke("config", "show", bad)
    assert r.exit_code == 2 and "greater than or equal to 1" in r.output
    r = invoke("config", "check", tmp_path / "missing.toml")
    assert r.exit_code == 2 and "file not found" in r.output


def test_simulate_refuses_non_empty_folder_and_unknown_preset(tmp_path):
    out = tmp_path / "sim"
    out.mkdir()
    (out / "keep.txt").write_text("x")
    r = invoke("simulate", out, "--preset", "tiny", "--seed", "1")
    assert r.exit_code == 2 and "exists and is not empty" in r.output
    r = invoke("simulate", tmp_path / "sim2", "--preset", "no-such-preset")
    assert r.exit_code == 2 and "no-such-preset" in r.output


def test_simulate_writes_a_run(tmp_path):
    r = invoke("simulate", tmp_path / "sim", "--preset", "tiny", "--seed", "2")
    assert r.exit_code == 0, r.output
    assert (tmp_path / "sim" / "truth" / "run.toml").is_file()


def test_barrier_on_curve_files_and_errors(tiny_run, tmp_path):
    from pipeline.io.readers import find_inputs, read_file

    files = find_inputs(tiny_run)
    curves = [f for f in files if read_file(f).attrs["kind"] == "curve"]
    frames = [f for f in files if read_file(f).attrs["kind"] == "frame"]
    png = tmp_path / "fits.png"
    r = invoke("barrier", *curves, "--plot", png)
    assert r.exit_code == 0, r.output
    assert "run estimate" in r.output and png.stat().st_size > 1000
    r = invoke("barrier", frames[0])
    assert r.exit_code == 2 and "not approach curves" in r.output
    r = invoke("barrier", tmp_path / "missing.nc")
    assert r.exit_code == 2 and "missing.nc: file not found" in r.output


def test_report_and_export_errors(tiny_store, tmp_path):
    store, _ = tiny_store
    out = tmp_path / "rep"
    r = invoke("report", store, "--out", out)
    assert r.exit_code == 0, r.output
    assert (out / "index.html").is_file()
    r = invoke("report", store, "--out", out)
    assert r.exit_code == 2  # existing report is not overwritten without --overwrite
    assert "--overwrite" in r.output or "overwrite" in r.output
    r = invoke("report", store, "--out", out, "--overwrite")
    assert r.exit_code == 0
    r = invoke("export", store, "--to", tmp_path / "ex", "--format", "bmp")
    assert r.exit_code == 2 and "bmp" in r.output
    r = invoke("export", store, "no-such-frame", "--to", tmp_path / "ex")
    assert r.exit_code == 2 and "no-such-frame" in r.output
    r = invoke("export", store, "--to", tmp_path / "ex", "--format", "npy")
    assert r.exit_code == 0, r.output
    r = invoke("export", store, "--to", tmp_path / "ex", "--format", "npy")
    assert r.exit_code == 2  # files exist: refused without --overwrite
    assert "exist" in r.output and "overwrite" in r.output


def test_reprocess_moved_source_exits_2(run_copy, tmp_path, serial_toml):
    store = tmp_path / "s.h5"
    assert invoke("process", run_copy, "--store", store, "--config", serial_toml).exit_code == 0
    victim = sorted(run_copy.glob("frame_*.nc"))[0]
    shutil.move(victim, tmp_path / victim.name)
    r = invoke("reprocess", store, "--store", tmp_path / "new.h5")
    assert r.exit_code == 2
    assert "source file is missing" in r.output and victim.name in r.output
    shutil.move(tmp_path / victim.name, victim)
    victim.write_bytes(victim.read_bytes() + b"\0")
    r = invoke("reprocess", store, "--store", tmp_path / "new.h5")
    assert r.exit_code == 2 and "changed since the store was made" in r.output


def test_reprocess_with_stored_config_reproduces(run_copy, tmp_path, serial_toml):
    import numpy as np

    from pipeline.io.store import open_store

    store = tmp_path / "s.h5"
    assert invoke("process", run_copy, "--store", store, "--config", serial_toml).exit_code == 0
    new = tmp_path / "again.h5"
    r = invoke("reprocess", store, "--store", new)
    assert r.exit_code == 0, r.output
    a, b = open_store(store), open_store(new)
    assert a.frame_ids == b.frame_ids
    for fid in a.frame_ids:
        np.testing.assert_array_equal(a.frame(fid)["height"].values,
                                      b.frame(fid)["height"].values)
    assert b.run().attrs["previous_config_sha256"] == a.run().attrs["config_sha256"]


def test_follow_missing_folder_exits_2(tmp_path):
    r = invoke("process", tmp_path / "nope", "--store", tmp_path / "s.h5", "--follow")
    assert r.exit_code == 2 and "does not exist" in r.output


def test_dask_without_scheduler_exits_2(tiny_run, tmp_path):
    r = invoke("process", tiny_run, "--store", tmp_path / "s.h5", "--executor", "dask")
    assert r.exit_code == 2 and "scheduler_address" in r.output


def test_dask_unreachable_scheduler_exits_2(tiny_run, tmp_path):
    pytest.importorskip("distributed")
    r = invoke("process", tiny_run, "--store", tmp_path / "s.h5",
               "--scheduler", "tcp://127.0.0.1:9")
    assert r.exit_code == 2 and "cannot reach the Dask scheduler" in r.output


def test_reprocess_of_a_non_store_exits_2(tmp_path):
    junk = tmp_path / "junk.h5"
    junk.write_text("x")
    r = invoke("reprocess", junk)
    assert r.exit_code == 2 and "not a readable HDF5 store" in r.output


def test_drift_line_says_when_drift_was_not_measured():
    from pipeline.cli import _drift_line

    # 1e-11 m/s × 60 s/min = 0.6 nm/min (unit arithmetic)
    assert _drift_line(1e-11, -0.5e-11) == "drift +0.600, -0.300 nm/min (x, y)"
    nan = float("nan")
    assert "not measured" in _drift_line(nan, nan)  # not "+nan" or a fake zero
