"""Crash safety (SIGKILL mid-run), watching a folder, reprocessing with a changed config."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from pipeline.batch import run_batch
from pipeline.config import parse_config
from pipeline.follow import follow_folder
from pipeline.io.staging import staged_frames
from pipeline.io.store import open_store


@pytest.mark.slow
@pytest.mark.parametrize("fraction", [0.15, 0.4, 0.65, 0.9])
def test_sigkill_leaves_previous_store_and_rerun_matches(run_copy, tmp_path, fraction, heights):
    store = tmp_path / "s.h5"
    cfg_a = tmp_path / "a.toml"
    cfg_a.write_text('[run]\nexecutor = "serial"\n')
    cfg_b = tmp_path / "b.toml"
    cfg_b.write_text('[run]\nexecutor = "serial"\n[level]\nmethod = "polynomial"\n')
    def cmd(target: Path) -> list[str]:
        return [sys.executable, "-m", "pipeline", "process", str(run_copy), "--store",
                str(target), "-q", "--config"]

    subprocess.run([*cmd(store), str(cfg_a)], check=True, capture_output=True)
    before = heights(store)

    def copy_state(src: Path, dst: Path) -> None:  # a store and its staged parts
        shutil.rmtree(dst.with_name(dst.name + ".parts"), ignore_errors=True)
        dst.unlink(missing_ok=True)
        dst.parent.mkdir(exist_ok=True)
        shutil.copy(src, dst)
        shutil.copytree(src.with_name(src.name + ".parts"), dst.with_name(dst.name + ".parts"))

    snapshot = tmp_path / "snapshot" / store.name
    copy_state(store, snapshot)
    # how long the run to be killed takes: the same run from a copy of the same state (the
    # staged curve fits are reused, the frames and drift pairs recomputed)
    twin = tmp_path / "twin" / store.name
    copy_state(snapshot, twin)
    t0 = time.monotonic()
    subprocess.run([*cmd(twin), str(cfg_b)], check=True, capture_output=True)
    duration = time.monotonic() - t0
    for _ in range(5):  # a run a little faster than its twin: try again, a little earlier
        copy_state(snapshot, store)
        proc = subprocess.Popen([*cmd(store), str(cfg_b)], stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL)
        time.sleep(fraction * duration)  # kill at that fraction of the run
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
        if proc.returncode == -signal.SIGKILL:
            break
        fraction *= 0.9
    else:
        pytest.fail("every run finished before it could be killed")
    # whatever moment the kill hit, the store opens and holds a complete committed run
    after_kill = heights(store)
    assert after_kill.keys() == before.keys()
    for p in staged_frames(store).values():  # staged parts are complete files
        assert p.stat().st_size > 0
    # the rerun (lock of the dead process taken over) completes like an uninterrupted run
    subprocess.run([*cmd(store), str(cfg_b)], check=True, capture_output=True)
    resumed = heights(store)
    clean = tmp_path / "clean.h5"
    subprocess.run([*cmd(clean), str(cfg_b)], check=True, capture_output=True)
    reference = heights(clean)
    assert resumed.keys() == reference.keys()
    for k in reference:
        np.testing.assert_array_equal(resumed[k], reference[k])


def test_follow_picks_up_new_files_and_ignores_growing_ones(tiny_run, tmp_path):
    watched = tmp_path / "watched"
    watched.mkdir()
    files = sorted(p for p in tiny_run.iterdir() if p.is_file())
    first, rest = files[:2], files[2:]
    for f in first:
        shutil.copy(f, watched / f.name)
    store = tmp_path / "f.h5"
    cfg = parse_config({"run": {"executor": "serial"}, "drift": {"enabled": False}})
    summaries = []
    t = threading.Thread(target=follow_folder, args=(watched, store, cfg),
                         kwargs={"poll_s": 0.4, "max_polls": 14, "on_summary": summaries.append})
    growing = watched / "growing.nc"
    payload = files[0].read_bytes()
    stop = threading.Event()

    def keep_writing() -> None:  # a file the instrument is still writing: it never settles
        i = 0
        while not stop.is_set():
            with growing.open("ab") as fh:
                fh.write(payload[i * 50:(i + 1) * 50] or b"\0")
            i += 1
            time.sleep(0.1)

    writer = threading.Thread(target=keep_writing)
    writer.start()
    t.start()
    time.sleep(1.5)
    for f in rest:  # the instrument writes more files while we watch
        shutil.copy(f, watched / f.name)
    t.join(timeout=120)
    stop.set()
    writer.join()
    assert not t.is_alive()
    assert len(summaries) >= 2  # committed once for the first files, again for the rest
    st = open_store(store)
    failed = {Path(f.file).name for f in st.failures()}
    assert "growing.nc" not in failed
    from pipeline.io.readers import find_inputs, read_file

    n_frames = sum(1 for f in find_inputs(tiny_run) if read_file(f).attrs["kind"] == "frame")
    assert len(st.frame_ids) == n_frames


def test_follow_keeps_one_worker_pool_for_all_commits(tiny_run, tmp_path, monkeypatch):
    import pipeline.follow as follow_mod

    original = follow_mod.make_executor
    made, closed = [], []

    def counting(config):
        ex = original(config)
        made.append(ex)
        close = ex.close
        ex.close = lambda: (closed.append(ex), close())
        return ex

    monkeypatch.setattr(follow_mod, "make_executor", counting)
    watched = tmp_path / "watched"
    watched.mkdir()
    files = sorted(p for p in tiny_run.iterdir() if p.is_file())
    for f in files[:2]:
        shutil.copy(f, watched / f.name)
    cfg = parse_config({"run": {"executor": "processes", "workers": 2},
                        "drift": {"enabled": False}})
    summaries = []
    t = threading.Thread(target=follow_folder, args=(watched, tmp_path / "f.h5", cfg),
                         kwargs={"poll_s": 0.4, "max_polls": 10, "on_summary": summaries.append})
    t.start()
    time.sleep(2.0)
    for f in files[2:]:
        shutil.copy(f, watched / f.name)
    t.join(timeout=120)
    assert not t.is_alive()
    assert len(summaries) >= 2 and summaries[-1].n_frames > summaries[0].n_frames
    assert len(made) == 1 and made[0].name == "processes"  # one pool for every commit
    assert closed == made  # closed when watching stops


def test_reprocess_with_changed_config_changes_only_what_it_touches(run_copy, tmp_path):
    from pipeline.reprocess import reprocess_store

    store = tmp_path / "s.h5"
    run_batch(run_copy, store, parse_config({"run": {"executor": "serial"}}))
    new_cfg = tmp_path / "new.toml"
    # the tip-change threshold only changes quality flags, never heights
    new_cfg.write_text('[run]\nexecutor = "serial"\n[quality]\ntip_change_threshold_sigma = 50.0\n')
    out = tmp_path / "new.h5"
    reprocess_store(store, config_path=new_cfg, out_store=out)
    a, b = open_store(store), open_store(out)
    for fid in a.frame_ids:
        np.testing.assert_array_equal(a.frame(fid)["height"].values,
                                      b.frame(fid)["height"].values)
    assert a.run().attrs["config_sha256"] != b.run().attrs["config_sha256"]
    assert b.run().attrs["previous_config_sha256"] == a.run().attrs["config_sha256"]
    # and a config that changes levelling changes the heights
    lv = tmp_path / "lv.toml"
    lv.write_text('[run]\nexecutor = "serial"\n[level]\nmethod = "polynomial"\n'
                  "polynomial_order = 3\nterraces = false\n")
    out2 = tmp_path / "lv.h5"
    reprocess_store(store, config_path=lv, out_store=out2)
    c = open_store(out2)
    assert any(not np.array_equal(a.frame(f)["height"].values, c.frame(f)["height"].values)
               for f in a.frame_ids)
