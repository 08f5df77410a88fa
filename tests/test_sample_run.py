"""The shipped sample run against its simulated ground truth (sample_scans/night-01/truth)."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.io.store import open_store


def test_run_completes_without_failures(sample_calibrated):
    _, summary, truth = sample_calibrated
    assert summary.exit_code == 0, summary.failures
    assert summary.n_frames == len(truth["frames"])


def test_work_function_within_50_meV(sample_calibrated):
    store, _, truth = sample_calibrated
    run = open_store(store).run().attrs
    # simulator ground truth; 0.05 eV is the barrier issue's acceptance bound
    assert abs(run["work_function_eV"] - truth["phi_eV"]) < 0.05


def test_drift_velocity_within_3_percent(sample_calibrated):
    store, _, truth = sample_calibrated
    run = open_store(store).run().attrs
    v_true = np.hypot(truth["drift_velocity_x_m_per_s"], truth["drift_velocity_y_m_per_s"])
    for axis in ("x", "y"):
        err = run[f"drift_velocity_{axis}_m_per_s"] - truth[f"drift_velocity_{axis}_m_per_s"]
        assert abs(err) < 0.03 * v_true, axis  # simulator truth; the drift issue's 3 % bound


def test_step_heights_and_z_scale(sample_calibrated):
    store, _, truth = sample_calibrated
    st = open_store(store)
    # the simulator's step is a/sqrt(3) with its piezo exactly calibrated: scale 1
    assert abs(st.run().attrs["z_scale_factor"] - 1.0) < 0.005
    steps = [st.frame(f).attrs.get("step_height_m") for f in st.frame_ids]
    ok = [s for s, f in zip(steps, st.frame_ids, strict=True)
          if s is not None and st.frame(f).attrs["status"] == "ok"]
    assert len(ok) >= 5
    np.testing.assert_allclose(ok, truth["step_height_m"], rtol=0.01)  # 1 % (levelling issue)


def test_lateral_calibration_of_an_exact_piezo(sample_calibrated):
    store, _, _ = sample_calibrated
    run = open_store(store).run().attrs
    # simulator lateral scale is exact; issue bound 0.3 % and 0.1 degree
    assert abs(run["lateral_scale_x"] - 1) < 0.003
    assert abs(run["lateral_scale_y"] - 1) < 0.003
    assert abs(run["lateral_skew_deg"]) < 0.1


def test_tip_change_frame_is_flagged(sample_calibrated):
    store, _, truth = sample_calibrated
    st = open_store(store)
    tipped = [f["file"] for f in truth["frames"] if f.get("tip_change_row", -1) not in (-1, None)]
    assert tipped
    for name in tipped:
        fid = name.rsplit(".", 1)[0]
        a = st.frame(fid).attrs
        assert a["status"] == "flagged"
        # the tip's own height jump is taken out, so its terraces and step come out true
        # (simulator truth; before, the jump was a terrace and the step came out 114 pm)
        jump = abs(float(np.atleast_1d(a["tip_jumps_m"])[0]))
        sigma = float(np.atleast_1d(a["tip_jump_uncertainties_m"])[0])
        assert abs(jump - truth["spec"]["tip_change_m"]) < 3 * sigma
        assert a["step_height_m"] == pytest.approx(truth["step_height_m"], rel=0.01)


def test_barrier_map_from_the_curve_grid(sample_calibrated):
    store, _, _ = sample_calibrated
    st = open_store(store)
    assert st.map_ids, "the sample's 4x4 curve grid makes a barrier map"
    m = st.barrier_map(st.map_ids[0])
    assert m["phi_ap_eV"].shape == (4, 4)
    assert np.isfinite(m["phi_ap_eV"].values).sum() >= 12


def test_up_down_pair_across_the_tip_change_is_right_or_not_measured(tmp_path):
    # frame_011 (tip change, scanned downwards) and frame_012 (upwards): a pair of opposite
    # slow directions whose bands differ by more than noise (the opposite shear, the tip
    # change). When the registration took that mismatch for white noise (rivals told apart
    # at 10 sd), two of its three bands came out confident at wrong shifts and the pair gave
    # 5.90 ± 0.17 pm/s in x, 6.5 sd from the simulator's 7.0 pm/s. Its velocity must be
    # within 3 sd of the truth, or not measured at all. Truth: sample_scans/night-01/truth.
    import tomllib
    from pathlib import Path

    from pipeline import tasks
    from pipeline.config import parse_config
    from pipeline.io.staging import read_staged
    from pipeline.stages.drift import drift_from_up_down_pair

    root = Path(__file__).resolve().parents[1] / "sample_scans" / "night-01"
    truth = tomllib.loads((root / "truth" / "run.toml").read_text())
    cfg = parse_config({"run": {"executor": "serial"}})
    staged = []
    for name in ("frame_011.nc", "frame_012.npz"):
        s = tasks.process_frame(str(root / name), str(tmp_path / "s.h5"), cfg, 4.6, 0.1, "k")
        assert s.failure is None, s.failure
        staged.append(read_staged(s.staged, ("height", "flags")))
    est = drift_from_up_down_pair(*staged, min_confidence=cfg.drift.min_confidence)
    for axis in ("x", "y"):
        v = getattr(est, f"velocity_{axis}_m_per_s")
        if np.isfinite(v):
            sigma = getattr(est, f"uncertainty_{axis}_m_per_s")
            assert abs(v - truth[f"drift_velocity_{axis}_m_per_s"]) < 3 * sigma, (axis, est)
