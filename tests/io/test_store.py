"""The store contract (DESIGN.md §4), read back through xarray, and its crash-safety pieces."""

from __future__ import annotations

import json
import os
import subprocess
import sys

import numpy as np
import pytest
import xarray as xr

from pipeline.errors import StoreError, StoreLockedError
from pipeline.io.staging import read_staged, staged_attrs, staged_frames, write_staged
from pipeline.io.store import (
    Failure,
    StoreBuilder,
    StoreLock,
    check_writable,
    open_store,
    remove_stale_temporaries,
    write_store,
)
from pipeline.model import Flag, make_height_frame, make_raw_frame, validate_raw_frame


def _frame(fid: str, seed: int = 0) -> xr.Dataset:
    rng = np.random.default_rng(seed)
    raw = validate_raw_frame(make_raw_frame(
        z=rng.normal(0, 1e-10, (6, 9)),
        attrs={"mode": "constant-current", "bias_V": 0.2, "setpoint_A": 1e-10,
               "scan_size_x_m": 9e-9, "scan_size_y_m": 6e-9, "line_time_s": 0.05,
               "start_time": "2026-04-01T23:10:00", "frame_id": fid}), source=f"{fid}.nc")
    flags = np.zeros((6, 9), np.uint8)
    flags[0, 0] = Flag.SATURATED
    ds = make_height_frame(raw, raw["z"].values, uncertainty=np.full((6, 9), 2e-12),
                           flags=flags, attrs={"status": "ok", "source_sha256": "ab" * 32,
                                               "source_file": f"/data/{fid}.nc",
                                               "work_function_eV": 4.6})
    return ds


def test_store_groups_open_with_xarray_and_round_trip(tmp_path):
    store = tmp_path / "s.h5"
    frames = [_frame("f001"), _frame("f002", 1)]
    run = xr.Dataset({"phi": (("curve",), np.array([4.5, 4.7]))},
                     attrs={"work_function_eV": 4.6, "work_function_uncertainty_eV": 0.05})
    write_store(store, frames=frames, run=run, failures=[Failure("bad.nc", "read", "truncated")],
                title="test run")
    root = xr.open_dataset(store, engine="h5netcdf")
    assert root.attrs["Conventions"] == "CF-1.10"
    assert root.attrs["software"].startswith("isogap ")
    for key in ("title", "created", "history"):
        assert key in root.attrs
    for original in frames:
        fid = original.attrs["frame_id"]
        back = xr.open_dataset(store, group=f"frames/{fid}", engine="h5netcdf").load()
        xr.testing.assert_identical(back, original)
        assert back["height"].attrs["units"] == "m"
        assert back["x"].attrs["units"] == "m" and back["y"].attrs["units"] == "m"
        assert back["height"].dtype == np.float32
        # CF flag attributes (CF-1.10 §3.5)
        assert list(back["flags"].attrs["flag_masks"]) == [1, 2, 4, 8, 16, 32, 64, 128]
        assert len(back["flags"].attrs["flag_meanings"].split()) == 8
    st = open_store(store)
    assert st.frame_ids == ["f001", "f002"]
    assert st.failures() == [Failure("bad.nc", "read", "truncated")]
    assert st.run().attrs["work_function_eV"] == 4.6


def test_empty_failures_group(tmp_path):
    store = tmp_path / "s.h5"
    write_store(store, frames=[_frame("a")], run=xr.Dataset(attrs={"x": 1}))
    assert open_store(store).failures() == []


def test_duplicate_frame_ids_refused_and_previous_store_kept(tmp_path):
    store = tmp_path / "s.h5"
    write_store(store, frames=[_frame("a")], run=xr.Dataset(attrs={"x": 1}))
    before = store.read_bytes()
    with pytest.raises(StoreError, match="two frames have the id 'a'"):
        write_store(store, frames=[_frame("a"), _frame("a")], run=xr.Dataset())
    assert store.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["s.h5"]  # no temporary left behind


def test_staging_is_atomic_and_listable(tmp_path):
    store = tmp_path / "s.h5"
    ds = _frame("f/../x y")
    path = write_staged(store, "frames", ds.attrs["frame_id"], ds)
    assert path.parent == tmp_path / "s.h5.parts" / "frames"
    assert ".." not in path.name and " " not in path.name
    assert list(staged_frames(store)) == [path.stem]
    xr.testing.assert_identical(read_staged(path), ds)
    assert staged_attrs(path)["frame_id"] == ds.attrs["frame_id"]


def test_lock_refuses_second_writer_naming_holder(tmp_path):
    store = tmp_path / "s.h5"
    with StoreLock(store):
        with pytest.raises(StoreLockedError, match=rf"pid {os.getpid()} on .*since"):
            StoreLock(store).acquire()
    StoreLock(store).acquire().release()  # released on exit


def test_stale_lock_of_dead_process_is_taken_over(tmp_path):
    store = tmp_path / "s.h5"
    proc = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                          capture_output=True, text=True, check=True)
    import socket

    lock = tmp_path / "s.h5.lock"
    lock.write_text(json.dumps({"pid": int(proc.stdout), "host": socket.gethostname(),
                                "started": "2026-01-01T00:00:00"}))
    with StoreLock(store):
        assert json.loads(lock.read_text())["pid"] == os.getpid()


def test_lock_of_a_killed_holder_is_released_by_the_os(tmp_path):
    import signal
    import time

    store = tmp_path / "s.h5"
    code = ("import sys, time; from pipeline.io.store import StoreLock; "
            f"StoreLock({str(store)!r}).acquire(); print('locked', flush=True); time.sleep(60)")
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "locked"
    with pytest.raises(StoreLockedError, match=rf"pid {proc.pid} on"):
        StoreLock(store).acquire()
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    proc.stdout.close()
    time.sleep(0.1)
    StoreLock(store).acquire().release()  # no stale lock to clean up by hand


def test_check_writable_errors(tmp_path):
    with pytest.raises(StoreError, match="does not exist"):
        check_writable(tmp_path / "nope" / "s.h5")
    (tmp_path / "d.h5").mkdir()
    with pytest.raises(StoreError, match="is a folder"):
        check_writable(tmp_path / "d.h5")
    with pytest.raises(StoreError, match="MB free"):
        check_writable(tmp_path / "s.h5", expected_bytes=10**16)
    if os.geteuid() != 0:  # root can write anywhere
        ro = tmp_path / "ro"
        ro.mkdir(mode=0o500)
        with pytest.raises(StoreError, match="not writable"):
            check_writable(ro / "s.h5")


def test_open_store_errors(tmp_path):
    with pytest.raises(StoreError, match="file not found"):
        open_store(tmp_path / "missing.h5")
    junk = tmp_path / "junk.h5"
    junk.write_bytes(b"not hdf5 at all")
    with pytest.raises(StoreError, match="not a readable HDF5 store"):
        open_store(junk)
    st = tmp_path / "s.h5"
    write_store(st, frames=[_frame("a")], run=xr.Dataset())
    with pytest.raises(StoreError, match="no frame 'zz'"):
        open_store(st).frame("zz")


def test_unwritable_commit_is_a_store_error_and_keeps_the_old_store(tmp_path, monkeypatch):
    store = tmp_path / "s.h5"
    write_store(store, frames=[_frame("a")], run=xr.Dataset(attrs={"x": 1}))
    before = store.read_bytes()

    def no_space(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr("pipeline.io.store.os.replace", no_space)
    with pytest.raises(StoreError, match="cannot be written \\(No space left on device\\)"):
        write_store(store, frames=[_frame("b")], run=xr.Dataset())
    assert store.read_bytes() == before


def test_builder_adds_frames_as_they_come_and_commits_atomically(tmp_path):
    store = tmp_path / "s.h5"
    write_store(store, frames=[_frame("old")], run=xr.Dataset(attrs={"x": 1}))
    before = store.read_bytes()
    frames = [_frame("f001"), _frame("f002", 1)]
    with StoreBuilder(store, title="streamed") as builder:
        builder.add_frame(frames[0])
        assert store.read_bytes() == before  # nothing replaced until the commit
        builder.add_frame(frames[1])
        builder.commit(run=xr.Dataset(attrs={"x": 2}), failures=[Failure("b.nc", "read", "?")])
    st = open_store(store)
    assert st.frame_ids == ["f001", "f002"] and st.run().attrs["x"] == 2
    for original in frames:
        xr.testing.assert_identical(st.frame(original.attrs["frame_id"]), original)
    assert [p.name for p in tmp_path.iterdir()] == ["s.h5"]


def test_builder_left_by_an_error_keeps_the_previous_store(tmp_path):
    store = tmp_path / "s.h5"
    write_store(store, frames=[_frame("a")], run=xr.Dataset())
    before = store.read_bytes()
    with pytest.raises(RuntimeError, match="stage failed"), StoreBuilder(store) as builder:
        builder.add_frame(_frame("b"))
        raise RuntimeError("stage failed")
    assert store.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["s.h5"]
    with pytest.raises(StoreError, match="already committed or aborted"):
        builder.add_frame(_frame("c"))


def test_stale_temporaries_of_a_killed_writer_are_removed(tmp_path):
    store = tmp_path / "s.h5"
    stale = [tmp_path / ".s.h5.0123456789ab.tmp", tmp_path / ".s.h5.ba9876543210.tmp"]
    for p in stale:
        p.write_bytes(b"half a store")
    others = [tmp_path / ".t.h5.0123456789ab.tmp",  # other stores': left alone
              tmp_path / ".s.h5.bak.0123456789ab.tmp"]
    for p in others:
        p.write_bytes(b"x")
    assert sorted(remove_stale_temporaries(store)) == sorted(stale)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(p.name for p in others)


def test_full_disk_while_adding_a_frame_keeps_the_previous_store(tmp_path, monkeypatch):
    store = tmp_path / "s.h5"
    write_store(store, frames=[_frame("a")], run=xr.Dataset())
    before = store.read_bytes()

    def no_space(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr("pipeline.io.store.write_grid", no_space)
    with pytest.raises(StoreError, match=r"cannot be written \(No space left on device\).*"
                                         r"staged parts are kept"):
        write_store(store, frames=[_frame("b")], run=xr.Dataset())
    assert store.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["s.h5"]
