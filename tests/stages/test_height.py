"""Height reconstruction: known surfaces through the barrier-decay law and a lagging feedback."""

from __future__ import annotations

import copy
import json
import math

import numpy as np
import pytest
import xarray as xr
from scipy import constants
from scipy.signal import lfilter

from pipeline import physics
from pipeline.errors import ProcessingError
from pipeline.model import Flag, get_history, get_warnings, make_raw_frame, validate_raw_frame
from pipeline.stages.height import estimate_trace_lag, estimate_white_noise, reconstruct_height

PHI_EV = 4.5
# 2κ = 2·√(2 mₑ φ)/ħ from CODATA constants (scipy.constants), ≈ 1.0246 Å⁻¹·√(φ/eV).
TWO_KAPPA = 2.0 * math.sqrt(2.0 * constants.m_e * PHI_EV * constants.e) / constants.hbar
N = 128
SIZE_M = 4e-9
A_NN_M = 2.885e-10  # Au(111) nearest-neighbour distance a/√2, a = 4.08 Å (from memory)


def lattice(n: int = N, size_m: float = SIZE_M, corrugation_m: float = 20e-12,
            angle: float = 0.2) -> np.ndarray:
    """Three-cosine hexagonal corrugation, peak-to-peak ``corrugation_m`` (common practice)."""
    x = (np.arange(n) + 0.5) * size_m / n
    xx, yy = np.meshgrid(x, x)
    k = 4 * np.pi / (math.sqrt(3) * A_NN_M)
    s = sum(np.cos(k * (np.cos(angle + j * 2 * np.pi / 3) * xx
                        + np.sin(angle + j * 2 * np.pi / 3) * yy)) for j in range(3))
    return corrugation_m * (s + 1.5) / 4.5


def attrs(mode: str = "constant-height", bias_V: float = 0.1, **extra: object) -> dict:
    a = {"mode": mode, "bias_V": bias_V, "scan_size_x_m": SIZE_M, "scan_size_y_m": SIZE_M,
         "line_time_s": 0.1, "start_time": "2026-03-14T22:05:11", "setpoint_A": 1e-10,
         "frame_id": "test"}
    a.update(extra)
    return a


def raw_frame(mode: str = "constant-height", z_units: str = "m", **channels_and_attrs):
    channels = {k: channels_and_attrs.pop(k) for k in
                ("current", "z", "current_backward", "z_backward") if k in channels_and_attrs}
    return validate_raw_frame(make_raw_frame(**channels, z_units=z_units,
                                             attrs=attrs(mode, **channels_and_attrs)))


def ch_current(surface: np.ndarray, i0: float = 1e-10) -> np.ndarray:
    """Constant-height current of the 1-D WKB law I = I0·exp(2κ·s) (DESIGN.md §6)."""
    return i0 * np.exp(TWO_KAPPA * surface)


def plane_residual(err: np.ndarray) -> np.ndarray:
    """``err`` minus its least-squares plane (numpy.linalg.lstsq), NaN ignored."""
    yy, xx = np.mgrid[0:err.shape[0], 0:err.shape[1]]
    ok = np.isfinite(err)
    design = np.column_stack([np.ones(ok.sum()), xx[ok], yy[ok]])
    coef, *_ = np.linalg.lstsq(design, err[ok], rcond=None)
    return err - (coef[0] + coef[1] * xx + coef[2] * yy)


def first_order_lag(forward: np.ndarray, backward: np.ndarray, alpha: float):
    """z following the surface with a first-order lag along the serpentine scan path."""
    ny, nx = forward.shape
    path = np.concatenate([forward, backward[:, ::-1]], axis=1).ravel()
    zp, _ = lfilter([alpha], [1.0, alpha - 1.0], path, zi=[(1 - alpha) * path[0]])
    zp = zp.reshape(ny, 2 * nx)
    return zp[:, :nx], zp[:, nx:][:, ::-1]


def height(ds: xr.Dataset) -> np.ndarray:
    return ds["height"].values.astype(np.float64)


def sigma(ds: xr.Dataset) -> np.ndarray:
    return ds["height_uncertainty"].values.astype(np.float64)


# --------------------------------------------------------------------------------------------
# physics and the constant-height conversion
# --------------------------------------------------------------------------------------------


def test_two_kappa_matches_codata() -> None:
    # 1.0246 Å⁻¹ per √eV: scipy.constants (CODATA); TESTING.md reference table
    assert TWO_KAPPA / math.sqrt(PHI_EV) == pytest.approx(1.0246e10, rel=1e-4)
    assert 2 * physics.decay_constant(PHI_EV) == pytest.approx(TWO_KAPPA, rel=1e-12)


def test_constant_height_noise_free_is_exact() -> None:
    s = lattice()
    out = reconstruct_height(raw_frame(current=ch_current(s)), work_function_eV=PHI_EV)
    err = height(out) - s
    # WKB inversion is exact; only float32 storage rounds (~1e-7 relative of 20 pm)
    assert np.std(err) * 1e12 <= 0.1
    assert np.all(out["flags"].values == 0)
    # h = 0 at the median current (I_ref = median, h_ref = 0)
    assert np.median(height(out)) == pytest.approx(0.0, abs=1e-15)
    assert out.attrs["reference_current_A"] == pytest.approx(np.median(ch_current(s)), rel=1e-12)


@pytest.mark.parametrize("noise", ["relative", "additive", "mixed"])
def test_constant_height_two_percent_noise(noise: str) -> None:
    rng = np.random.default_rng({"relative": 1, "additive": 2, "mixed": 3}[noise])
    s = lattice(corrugation_m=25e-12)
    i0 = ch_current(s)
    g1, g2 = rng.standard_normal((2, N, N))
    if noise == "relative":
        cur = i0 * (1 + 0.02 * g1)
    elif noise == "additive":
        cur = i0 + 0.02 * np.median(i0) * g1
    else:
        cur = i0 * (1 + 0.014 * g1) + 0.014 * np.median(i0) * g2
    out = reconstruct_height(raw_frame(current=cur), work_function_eV=PHI_EV)
    err = plane_residual(height(out) - s)
    # expected noise 0.02/(2κ) ≈ 0.92 pm (error propagation of the WKB law); bound 2 pm
    assert np.sqrt(np.mean(err**2)) * 1e12 <= 2.0
    # honest uncertainty: errors / reported σ have unit standard deviation (TESTING.md)
    assert 0.8 <= np.std(err / sigma(out)) <= 1.25


@pytest.mark.parametrize("noise", ["additive", "relative"])
def test_constant_height_uncertainty_with_large_contrast(noise: str) -> None:
    """An adsorbate raising the current ×10: the noise model stays honest everywhere."""
    rng = np.random.default_rng(4)
    yy, xx = np.mgrid[0:N, 0:N]
    s = lattice() + 100e-12 * np.exp(-((xx - 60) ** 2 + (yy - 70) ** 2) / (2 * 12.0**2))
    i0 = ch_current(s)
    g = rng.standard_normal((N, N))
    cur = i0 + 2e-12 * g if noise == "additive" else i0 * (1 + 0.02 * g)
    out = reconstruct_height(raw_frame(current=cur), work_function_eV=PHI_EV)
    ratio = (height(out) - s - np.mean(height(out) - s)) / sigma(out)
    top = i0 > np.quantile(i0, 0.9)
    assert 0.8 <= np.std(ratio[top]) <= 1.25
    assert 0.8 <= np.std(ratio[~top]) <= 1.25


def test_uncertainty_calibrated_over_seeds() -> None:
    """Errors / reported σ pooled over 10 noise draws (both traces, mixed noise): std ≈ 1."""
    s = lattice()
    i0 = ch_current(s)
    ratios = []
    for seed in range(10):
        g = np.random.default_rng(100 + seed).standard_normal((4, N, N))
        cur_f = i0 * (1 + 0.015 * g[0]) + 1.5e-12 * g[1]
        cur_b = i0 * (1 + 0.015 * g[2]) + 1.5e-12 * g[3]
        out = reconstruct_height(raw_frame(current=cur_f, current_backward=cur_b),
                                 work_function_eV=PHI_EV)
        err = height(out) - s
        ratios.append((err - err.mean()) / sigma(out))
    pooled = np.std(np.concatenate([r.ravel() for r in ratios]))
    # TESTING.md: over many seeds the normalised errors must have a standard deviation near 1
    assert 0.9 <= pooled <= 1.1
    assert max(np.std(r) for r in ratios) - min(np.std(r) for r in ratios) < 0.1


def test_given_current_noise_is_used() -> None:
    rng = np.random.default_rng(5)
    s = lattice()
    i0 = ch_current(s)
    cur = i0 + 2e-12 * rng.standard_normal((N, N))
    out = reconstruct_height(raw_frame(current=cur), work_function_eV=PHI_EV,
                             current_noise_A=2e-12)
    # σ_h = σ_I/(2κ|I|) (DESIGN.md §6), evaluated with the measured current
    expect = 2e-12 / (TWO_KAPPA * np.abs(cur))
    np.testing.assert_allclose(sigma(out), expect, rtol=1e-6)
    assert out.attrs["current_noise_A"] == pytest.approx(2e-12)
    assert out.attrs["noise_floor_A"] == pytest.approx(6e-12)  # 3 σ_I default floor


def test_work_function_uncertainty_term() -> None:
    s = lattice(corrugation_m=30e-12)
    raw = raw_frame(current=ch_current(s))
    sphi = 0.3
    out0 = reconstruct_height(raw, work_function_eV=PHI_EV)
    out1 = reconstruct_height(raw, work_function_eV=PHI_EV, work_function_uncertainty_eV=sphi)
    extra = np.sqrt(np.maximum(sigma(out1) ** 2 - sigma(out0) ** 2, 0))
    # ∂h/∂φ = −h/(2φ) for h = ln(I/I_ref)/(2κ), κ ∝ √φ: checked by a central difference
    d = 1e-3
    hp = height(reconstruct_height(raw, work_function_eV=PHI_EV + d))
    hm = height(reconstruct_height(raw, work_function_eV=PHI_EV - d))
    dh_dphi = (hp - hm) / (2 * d)
    np.testing.assert_allclose(dh_dphi, -height(out0) / (2 * PHI_EV), atol=2e-15)
    np.testing.assert_allclose(extra, np.abs(dh_dphi) * sphi, atol=5e-16)
    assert out1.attrs["work_function_uncertainty_eV"] == sphi


def test_negative_bias_gives_the_same_height() -> None:
    s = lattice()
    pos = reconstruct_height(raw_frame(current=ch_current(s)), work_function_eV=PHI_EV)
    neg = reconstruct_height(raw_frame(current=-ch_current(s), bias_V=-0.1),
                             work_function_eV=PHI_EV)
    np.testing.assert_array_equal(height(neg), height(pos))
    assert neg.attrs["reference_current_A"] < 0


# --------------------------------------------------------------------------------------------
# bad pixels
# --------------------------------------------------------------------------------------------


def test_saturated_pixels_at_current_limit_are_flagged() -> None:
    s = lattice()
    cur = ch_current(s)
    limit = float(np.quantile(cur, 0.97))
    clipped = np.minimum(cur, limit)
    out = reconstruct_height(raw_frame(current=clipped, current_limit_A=limit),
                             work_function_eV=PHI_EV)
    sat = (out["flags"].values & Flag.SATURATED) != 0
    np.testing.assert_array_equal(sat, cur >= 0.999 * limit)
    assert np.all(np.isnan(height(out)[sat]))
    assert any("saturated" in w for w in get_warnings(out))


def test_saturated_plateau_found_without_limit_attribute() -> None:
    s = lattice()
    cur = ch_current(s)
    clipped = np.minimum(cur, np.quantile(cur, 0.98))
    out = reconstruct_height(raw_frame(current=clipped), work_function_eV=PHI_EV)
    sat = (out["flags"].values & Flag.SATURATED) != 0
    np.testing.assert_array_equal(sat, clipped == clipped.max())
    assert sat.sum() >= 0.019 * sat.size


def test_below_floor_and_wrong_sign_pixels_are_flagged() -> None:
    s = lattice()
    cur = ch_current(s)
    cur[10, 10:20] = -3e-12  # wrong sign for a positive bias (noise near zero)
    cur[50, 40:45] = 1e-13  # far below the floor
    out = reconstruct_height(raw_frame(current=cur), work_function_eV=PHI_EV,
                             noise_floor_A=1e-12)
    low = (out["flags"].values & Flag.NOISE_FLOOR) != 0
    expect = np.zeros((N, N), bool)
    expect[10, 10:20] = expect[50, 40:45] = True
    np.testing.assert_array_equal(low, expect)
    assert np.all(np.isnan(height(out)[low]))
    assert np.all(np.isfinite(height(out)[~low]))
    assert out.attrs["noise_floor_A"] == 1e-12


def test_not_recorded_rows_are_flagged_and_warning_kept() -> None:
    rng = np.random.default_rng(6)
    s = lattice()
    cur = ch_current(s) * (1 + 0.02 * rng.standard_normal((N, N)))
    cur[-20:] = np.nan
    cur[5, 7] = np.inf
    raw = raw_frame(current=cur)
    out = reconstruct_height(raw, work_function_eV=PHI_EV)
    nr = (out["flags"].values & Flag.NOT_RECORDED) != 0
    np.testing.assert_array_equal(nr, ~np.isfinite(cur))
    assert np.all(np.isnan(height(out)[nr]))
    assert get_warnings(raw)[0] in get_warnings(out)
    err = plane_residual(height(out) - s)
    assert 0.8 <= np.nanstd(err / sigma(out)) <= 1.25


def test_nothing_left_is_a_clear_error() -> None:
    cur = np.full((N, N), 1e-13)
    cur[0, 0] = 2e-13
    with pytest.raises(ProcessingError, match=r"frame test: no pixel left .* noise floor"):
        reconstruct_height(raw_frame(current=cur), work_function_eV=PHI_EV,
                           noise_floor_A=1e-12)


def test_flat_current_gives_flat_height_and_a_warning() -> None:
    out = reconstruct_height(raw_frame(current=np.full((N, N), 1e-10)),
                             work_function_eV=PHI_EV)
    assert np.all(height(out) == 0)
    assert np.all(out["flags"].values == 0)
    assert any("no contrast" in w for w in get_warnings(out))


# --------------------------------------------------------------------------------------------
# constant-current mode
# --------------------------------------------------------------------------------------------


def terraced_surface() -> np.ndarray:
    yy, xx = np.mgrid[0:N, 0:N]
    # Au(111) monatomic step a/√3 = 2.355 Å (crystal geometry, a = 4.08 Å from memory)
    return lattice() + np.where(xx + 0.5 * yy > 90, 2.355e-10, 0.0)


def test_feedback_error_correction_recovers_surface_exactly() -> None:
    s = terraced_surface()
    zf, zb = first_order_lag(s, s, alpha=0.3)
    assert np.abs(zf - s).max() > 1e-10  # the lag really distorts z by > 100 pm at the step
    # residual current of the 1-D WKB law around the setpoint: I = I_set·exp(2κ(s − z))
    cur_f = 1e-10 * np.exp(TWO_KAPPA * (s - zf))
    cur_b = 1e-10 * np.exp(TWO_KAPPA * (s - zb))
    for raw in (raw_frame("constant-current", z=zf, current=cur_f),
                raw_frame("constant-current", z=zf, current=cur_f, z_backward=zb,
                          current_backward=cur_b)):
        out = reconstruct_height(raw, work_function_eV=PHI_EV)
        # h = z + ln(I/I_set)/(2κ) is exact (DESIGN.md §6); float32 storage of ~250 pm
        assert np.abs(height(out) - s).max() * 1e12 < 1e-3


def test_constant_current_noise_and_uncertainty() -> None:
    rng = np.random.default_rng(7)
    s = terraced_surface()
    zf, zb = first_order_lag(s, s, alpha=0.3)
    g = rng.standard_normal((4, N, N))
    cur_f = 1e-10 * np.exp(TWO_KAPPA * (s - zf)) * (1 + 0.02 * g[0])
    cur_b = 1e-10 * np.exp(TWO_KAPPA * (s - zb)) * (1 + 0.02 * g[1])
    zf_rec, zb_rec = zf + 1e-12 * g[2], zb + 1e-12 * g[3]  # z read-out noise
    raw = raw_frame("constant-current", z=zf_rec, current=cur_f, z_backward=zb_rec,
                    current_backward=cur_b)
    single = reconstruct_height(raw, work_function_eV=PHI_EV, combine_traces=False)
    both = reconstruct_height(raw, work_function_eV=PHI_EV)
    e1, e2 = height(single) - s, height(both) - s
    # error propagation: σ_h² = σ_z² + (0.02/2κ)² ≈ (1.36 pm)²; both traces: /√2
    assert np.std(e1) * 1e12 == pytest.approx(1.36, rel=0.1)
    assert np.std(e2) == pytest.approx(np.std(e1) / math.sqrt(2), rel=0.1)
    assert 0.8 <= np.std(e1 / sigma(single)) <= 1.25
    assert 0.8 <= np.std(e2 / sigma(both)) <= 1.25
    assert abs(both.attrs["trace_lag_px"]) < 0.05  # corrected traces have no lag


def test_constant_current_without_residual_current_is_z() -> None:
    s = terraced_surface()
    out = reconstruct_height(raw_frame("constant-current", z=s), work_function_eV=PHI_EV)
    np.testing.assert_array_equal(height(out), s.astype(np.float32))
    assert "no feedback-error correction" in out.attrs["height_reference"]


def test_piezo_volts_are_scaled_to_metres() -> None:
    s = terraced_surface()
    volts = s / 2.5e-9  # a piezo of 2.5 nm/V (typical order, from memory)
    raw = raw_frame("constant-current", z_units="V", z=volts, piezo_z_m_per_V=2.5e-9)
    out = reconstruct_height(raw, work_function_eV=PHI_EV)
    np.testing.assert_allclose(height(out), s, rtol=1e-6, atol=1e-18)


def test_constant_current_negative_bias_and_setpoint_sign() -> None:
    s = terraced_surface()
    zf, _ = first_order_lag(s, s, alpha=0.3)
    cur = -1e-10 * np.exp(TWO_KAPPA * (s - zf))
    raw = raw_frame("constant-current", z=zf, current=cur, bias_V=-0.5, setpoint_A=-1e-10)
    out = reconstruct_height(raw, work_function_eV=PHI_EV)
    assert np.abs(height(out) - s).max() * 1e12 < 1e-3


# --------------------------------------------------------------------------------------------
# forward / backward traces
# --------------------------------------------------------------------------------------------


def smooth_surface(shift_px: float) -> np.ndarray:
    """Band-limited analytic topography sampled at x − shift (pixels)."""
    yy, xx = np.mgrid[0:N, 0:N].astype(float)
    x = xx - shift_px
    return (15e-12 * np.sin(2 * np.pi * x / 9.3 + 0.3 * yy) + 10e-12 * np.cos(
        2 * np.pi * (x / 17.1 + yy / 23.0)) + 30e-12 * np.exp(-((x - 70) ** 2 + (yy - 40) ** 2)
                                                              / 60.0))


def test_estimate_trace_lag_sign_and_precision() -> None:
    for lag in (0.7, -1.3, 0.0):
        f, b = smooth_surface(lag / 2), smooth_surface(-lag / 2)
        est, corr = estimate_trace_lag(f, b)
        # forward(x) = backward(x − L) by construction
        assert est == pytest.approx(lag, abs=0.02)
        assert corr > 0.9


def test_trace_lag_reported_and_traces_aligned() -> None:
    rng = np.random.default_rng(8)
    half = 0.35
    s_true = smooth_surface(0.0)
    cur_f = ch_current(smooth_surface(half)) * (1 + 0.02 * rng.standard_normal((N, N)))
    cur_b = ch_current(smooth_surface(-half)) * (1 + 0.02 * rng.standard_normal((N, N)))
    out = reconstruct_height(raw_frame(current=cur_f, current_backward=cur_b),
                             work_function_eV=PHI_EV)
    assert out.attrs["trace_lag_px"] == pytest.approx(2 * half, abs=0.1)
    err = plane_residual(height(out) - s_true)
    # two traces at 0.92 pm each, aligned: ≈ 0.65 pm (bound: one trace's noise)
    assert np.std(err) * 1e12 < 0.92
    assert 0.8 <= np.std(err / sigma(out)) <= 1.25
    assert ((out["flags"].values & Flag.TRACE_MISMATCH) != 0).mean() < 1e-3


def test_trace_mismatch_is_flagged() -> None:
    rng = np.random.default_rng(9)
    s = lattice()
    cur_f = ch_current(s) * (1 + 0.02 * rng.standard_normal((N, N)))
    s_b = s.copy()
    s_b[60:70, 30:50] += 40e-12  # something on the backward trace only (≈ 30 σ)
    cur_b = ch_current(s_b) * (1 + 0.02 * rng.standard_normal((N, N)))
    out = reconstruct_height(raw_frame(current=cur_f, current_backward=cur_b),
                             work_function_eV=PHI_EV)
    mism = (out["flags"].values & Flag.TRACE_MISMATCH) != 0
    assert mism[61:69, 31:49].all()
    outside = mism.copy()
    outside[58:72, 28:52] = False
    assert outside.sum() <= 5
    # the forward trace is kept where the traces disagree
    err = height(out)[61:69, 31:49] - s[61:69, 31:49]
    assert np.abs(err - np.median(height(out) - s)).max() < 10e-12
    assert any("differ by more than 5 sigma" in w for w in get_warnings(out))


def test_combine_traces_off_uses_forward_only() -> None:
    s = lattice()
    out = reconstruct_height(
        raw_frame(current=ch_current(s), current_backward=ch_current(s + 5e-12)),
        work_function_eV=PHI_EV, combine_traces=False)
    np.testing.assert_allclose(height(out), s - np.median(s), atol=1e-16)
    assert "trace_lag_px" in out.attrs


# --------------------------------------------------------------------------------------------
# noise estimator
# --------------------------------------------------------------------------------------------


def test_white_noise_estimate_is_unbiased() -> None:
    rng = np.random.default_rng(10)
    est = [estimate_white_noise(rng.standard_normal((N, N))).constant for _ in range(8)]
    # numpy's standard normal has σ = 1; the estimator's precision is ~1.5 % per frame
    assert np.mean(est) == pytest.approx(1.0, abs=0.02)


def test_white_noise_estimate_ignores_lattice_peaks_and_steps() -> None:
    rng = np.random.default_rng(11)
    surface = terraced_surface()
    est = estimate_white_noise(surface + 1e-12 * rng.standard_normal((N, N)))
    assert est.constant == pytest.approx(1e-12, rel=0.08)


def test_heteroscedastic_noise_model() -> None:
    rng = np.random.default_rng(12)
    level = np.exp(np.linspace(0, np.log(10), N))[None, :] * np.ones((N, 1))
    noise = np.sqrt(0.5**2 + (0.1 * level) ** 2) * rng.standard_normal((N, N))
    est = estimate_white_noise(level + noise, level=level)
    assert est.constant == pytest.approx(0.5, rel=0.15)
    assert est.relative == pytest.approx(0.1, rel=0.15)


# --------------------------------------------------------------------------------------------
# contract
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(20))
def test_two_variable_nnls_matches_scipy(seed: int) -> None:
    """Reference library: scipy.optimize.nnls, on problems with no, one or both bounds active."""
    from scipy.optimize import nnls

    from pipeline.stages.height.noise import _nnls2

    rng = np.random.default_rng(seed)
    a = np.abs(rng.normal(size=(16, 2))) + 0.1
    b = a @ rng.normal(size=2) + 0.3 * rng.normal(size=16)  # coefficients of either sign
    np.testing.assert_allclose(_nnls2(a, b), nnls(a, b)[0], rtol=1e-9, atol=1e-12)


def test_input_not_mutated_and_history_appended() -> None:
    rng = np.random.default_rng(13)
    s = lattice()
    cur = ch_current(s) * (1 + 0.02 * rng.standard_normal((N, N)))
    cur[-3:] = np.nan
    raw = raw_frame(current=cur, current_backward=cur[:, ::-1][:, ::-1].copy())
    before = copy.deepcopy(raw)
    out = reconstruct_height(raw, work_function_eV=PHI_EV, work_function_uncertainty_eV=0.2)
    xr.testing.assert_identical(raw, before)
    assert out is not raw
    assert get_history(out)[-1]["stage"] == "reconstruct_height"
    assert set(out.data_vars) == {"height", "height_uncertainty", "flags"}
    assert out["height"].dtype == np.float32
    assert out.attrs["work_function_eV"] == PHI_EV
    assert out.attrs["frame_id"] == "test"
    assert "status" not in out.attrs
    json.loads(out.attrs["warnings"])


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"work_function_eV": 0.0}, r"frame test: work_function_eV = 0.0 must be a positive"),
    ({"work_function_eV": PHI_EV, "work_function_uncertainty_eV": -1.0},
     r"work_function_uncertainty_eV = -1.0"),
    ({"work_function_eV": PHI_EV, "trace_mismatch_sigma": 0.0}, r"trace_mismatch_sigma = 0.0"),
    ({"work_function_eV": PHI_EV, "noise_floor_A": -1e-12}, r"noise_floor_A = -1e-12"),
])
def test_bad_parameters(kwargs: dict, match: str) -> None:
    raw = raw_frame(current=ch_current(lattice()))
    with pytest.raises(ProcessingError, match=match):
        reconstruct_height(raw, **kwargs)


def test_unvalidated_frame_is_refused() -> None:
    raw = make_raw_frame(current=ch_current(lattice()) * 1e12, attrs=attrs())
    raw["current"].attrs["units"] = "pA"
    with pytest.raises(ProcessingError, match=r"'current' is in 'pA', expected 'A'"):
        reconstruct_height(raw, work_function_eV=PHI_EV)
