"""Checks of the frame simulator against physics it did not write (scipy.constants, ase)."""

from __future__ import annotations

import math
from datetime import datetime, timedelta

import numpy as np
import pytest
import xarray as xr
from scipy import constants

from pipeline.errors import ConfigError
from pipeline.model import get_warnings, pixel_time_s, validate_raw_frame
from pipeline.simulate import (
    Adsorbate,
    Step,
    Surface,
    frame_times_s,
    simulate_constant_current_frame,
    simulate_constant_height_frame,
)

T0 = datetime(2026, 3, 14, 22, 0, 0)

#: 2κ = 2·√(2 mₑ φ)/ħ for φ = 1 eV, from CODATA constants (scipy.constants); Tersoff & Hamann,
#: Phys. Rev. B 31, 805 (1985) quote 2κ = 1.0246 Å⁻¹·√(φ/eV).
TWO_KAPPA_1EV = 2.0 * math.sqrt(2.0 * constants.m_e * constants.e) / constants.hbar


def au_lattice_constant() -> float:
    """Au cubic lattice constant from ase's reference data (ase.data.reference_states)."""
    from ase.data import atomic_numbers, reference_states

    return reference_states[atomic_numbers["Au"]]["a"] * 1e-10


def terraced(**kw) -> Surface:
    base = {"lattice_constant_m": 4.078e-10, "steps": (Step(offset_m=1e-9, angle_deg=10.0),),
            "corrugation_m": 1.5e-11, "adsorbates": (Adsorbate(-3e-9, 2e-9, 1.5e-10, 5e-10),),
            "slope_x": 0.01, "slope_y": -0.004}
    base.update(kw)
    return Surface(**base)


def cc(surface: Surface, seed: int = 1, **kw):
    args = {"phi_eV": 4.6, "setpoint_A": 1e-10, "bias_V": 0.5, "nx": 64, "ny": 48,
            "size_x_m": 12e-9, "line_time_s": 0.1, "start_time": T0}
    args.update(kw)
    return simulate_constant_current_frame(surface, rng=np.random.default_rng(seed), **args)


def ch(surface: Surface, seed: int = 1, **kw):
    args = {"phi_eV": 4.6, "bias_V": 0.1, "nx": 64, "ny": 48, "size_x_m": 6e-9,
            "line_time_s": 0.1, "start_time": T0}
    args.update(kw)
    return simulate_constant_height_frame(surface, rng=np.random.default_rng(seed), **args)


NOISY = {"feedback_time_constant_s": 4e-4, "current_noise_fraction": 0.03, "z_noise_m": 2e-12,
         "line_offsets_m": 5e-12, "scars": 3, "drift_velocity_m_per_s": (1e-11, -5e-12)}


# ---- determinism -------------------------------------------------------------------------


def test_same_seed_gives_identical_frames_and_different_seeds_differ():
    s = terraced()
    raw1, truth1 = cc(s, seed=5, **NOISY)
    raw2, truth2 = cc(s, seed=5, **NOISY)
    raw3, _ = cc(s, seed=6, **NOISY)
    xr.testing.assert_identical(raw1, raw2)
    xr.testing.assert_identical(truth1, truth2)
    assert not np.array_equal(raw1["z"].values, raw3["z"].values)
    assert not np.array_equal(raw1["current"].values, raw3["current"].values)
    h1, _ = ch(s, seed=5, current_noise_fraction=0.02, noise_floor_A=1e-12)
    h2, _ = ch(s, seed=5, current_noise_fraction=0.02, noise_floor_A=1e-12)
    h3, _ = ch(s, seed=9, current_noise_fraction=0.02, noise_floor_A=1e-12)
    np.testing.assert_array_equal(h1["current"].values, h2["current"].values)
    assert not np.array_equal(h1["current"].values, h3["current"].values)


# ---- barrier law ---------------------------------------------------------------------------


def test_decay_constant_matches_tersoff_hamann_value():
    # source: Tersoff & Hamann (1985) / Chen, Introduction to STM: 2κ = 1.0246 Å⁻¹ per √eV
    assert TWO_KAPPA_1EV * 1e-10 == pytest.approx(1.0246, abs=5e-5)


@pytest.mark.parametrize("phi", [3.0, 4.6, 5.3])
def test_constant_height_current_obeys_wkb_exponential(phi):
    raw, truth = ch(terraced(), phi_eV=phi, drift_velocity_m_per_s=(2e-11, 1e-11))
    h = truth["height_at_pixel"].values.ravel()
    lni = np.log(np.abs(raw["current"].values.ravel()))
    slope = np.polyfit(h, lni, 1)[0]
    # source: scipy.constants (CODATA), 2κ = 2√(2 mₑ φ)/ħ (Tersoff & Hamann 1985)
    assert slope == pytest.approx(TWO_KAPPA_1EV * math.sqrt(phi), rel=1e-6)
    # the map spans a real height range, so the fit is meaningful
    assert np.ptp(h) > 1e-11


def test_constant_height_reference_current_and_gap():
    raw, truth = ch(terraced(), tip_height_m=7e-10, reference_current_A=2e-10,
                    reference_gap_m=5e-10)
    two_kappa = TWO_KAPPA_1EV * math.sqrt(4.6)  # scipy.constants (CODATA)
    gap = truth.attrs["tip_z_m"] - truth["height_at_pixel"].values
    expected = 2e-10 * np.exp(-two_kappa * (gap - 5e-10))
    np.testing.assert_allclose(raw["current"].values, expected, rtol=1e-12)
    # the tip sits tip_height_m above the mean sampled surface
    assert truth.attrs["tip_z_m"] - truth["height_at_pixel"].values.mean() == pytest.approx(
        7e-10, rel=1e-12)


def test_constant_current_feedback_error_restores_sampled_height():
    s = terraced()
    for slow in ("increasing", "decreasing"):
        raw, truth = cc(s, feedback_time_constant_s=5e-4, drift_velocity_m_per_s=(1e-11, 4e-12),
                        slow_direction=slow)
        two_kappa = TWO_KAPPA_1EV * math.sqrt(4.6)  # scipy.constants (CODATA)
        for tr, h in (("", "height_at_pixel"), ("_backward", "height_at_pixel_backward")):
            rec = raw["z" + tr].values + np.log(raw["current" + tr].values / 1e-10) / two_kappa
            # DESIGN §6: h = z + ln(I/I_set)/(2κ); exact without noise, < 1e-3 pm
            assert np.max(np.abs(rec - truth[h].values)) < 1e-15
        # the lag is real: the residual current departs from the setpoint at the step
        assert np.max(np.abs(np.log(raw["current"].values / 1e-10))) > 0.1


def test_feedback_lag_is_first_order_step_response():
    # a sharp step down along the fast axis, between two pixel centres
    nx, line_time, tau = 64, 0.128, 3e-3
    dx = 12e-9 / nx
    x_edge = 0.35 * dx
    s = Surface(steps=(Step(offset_m=x_edge, angle_deg=0.0),), step_width_m=0.0)
    raw, truth = cc(s, nx=nx, ny=4, line_time_s=line_time, feedback_time_constant_s=tau)
    z = raw["z"].values[2]
    h = truth["height_at_pixel"].values[2]
    step = s.step_height_m
    i0 = int(np.argmax(h < h[0] - 0.5 * step))  # first pixel past the edge
    n = np.arange(0, 10)
    dt = line_time / (2 * nx)
    # first-order system: error decays as exp(-t/τ) after a step (common practice)
    expected = step * np.exp(-(n + 1) * dt / tau)
    np.testing.assert_allclose(z[i0 + n] - h[i0 + n], expected, rtol=1e-9)


# ---- crystal geometry ----------------------------------------------------------------------


def test_monatomic_step_height_is_a_over_root3_for_au():
    a = au_lattice_constant()
    s = Surface(lattice_constant_m=a, steps=(Step(offset_m=0.0, angle_deg=0.0),))
    _, truth = cc(s, size_x_m=20e-9, nx=100)
    h = truth["height_true"].values
    x = truth["x"].values
    label = truth["terrace_label"].values
    left = h[:, x < -3e-9].mean()
    right = h[:, x > 3e-9].mean()
    # ase reference data + crystal geometry: fcc(111) monatomic step = a/√3 (≈ 2.356 Å for Au)
    assert left - right == pytest.approx(a / math.sqrt(3.0), rel=1e-9)
    assert set(np.unique(label)) == {-1, 0}
    assert s.step_height_m == pytest.approx(2.3556e-10, rel=1e-4)


def test_hexagonal_corrugation_fft_peaks():
    from ase.build import fcc111

    slab = fcc111("Au", size=(2, 2, 1), a=au_lattice_constant() * 1e10, vacuum=5.0)
    d = slab.get_all_distances(mic=True)
    a_nn = float(np.min(d[d > 0.1])) * 1e-10  # ase: nearest-neighbour distance of Au(111)
    theta = 12.0
    s = Surface(lattice_constant_m=au_lattice_constant(), corrugation_m=2e-11,
                corrugation_angle_deg=theta, lattice_origin_m=(0.3e-10, -0.2e-10))
    n, size, pad = 128, 5e-9, 4
    _, truth = cc(s, nx=n, ny=n, size_x_m=size)
    h = truth["height_true"].values
    win = np.hanning(n)
    spec = np.abs(np.fft.fftshift(np.fft.fft2((h - h.mean()) * np.outer(win, win),
                                              s=(pad * n, pad * n))))
    k = np.fft.fftshift(np.fft.fftfreq(pad * n, d=size / n))  # cycles per m
    # six strongest local maxima
    from scipy.ndimage import maximum_filter

    peaks = (spec == maximum_filter(spec, size=9)) & (spec > 0.2 * spec.max())
    iy, ix = np.nonzero(peaks)
    assert len(iy) == 6
    found = np.stack([k[ix], k[iy]], axis=1)
    # triangular net of spacing a_nn: first reciprocal shell at 2/(√3 a_nn), 60° apart
    # (crystal geometry, e.g. Ashcroft & Mermin ch. 5)
    kmag = 2.0 / (math.sqrt(3.0) * a_nn)
    ang = np.radians(theta + 30.0 + 60.0 * np.arange(6))
    expected = kmag * np.stack([np.cos(ang), np.sin(ang)], axis=1)
    bin_k = 1.0 / (pad * size)
    for f in found:
        err = np.min(np.linalg.norm(expected - f, axis=1))
        assert err <= 0.75 * bin_k  # within the zero-padded FFT grid's resolution
    angles = np.sort(np.degrees(np.arctan2(found[:, 1], found[:, 0])) % 360.0)
    np.testing.assert_allclose(np.diff(angles), 60.0, atol=math.degrees(1.5 * bin_k / kmag))


# ---- timing and drift ------------------------------------------------------------------------


@pytest.mark.parametrize("slow", ["increasing", "decreasing"])
def test_pixel_times_forward_from_model_backward_reversed(slow):
    nx, ny, line = 16, 6, 0.2
    t_f, t_b = frame_times_s(nx, ny, line, slow)
    probe = xr.Dataset(coords={"y": np.arange(ny), "x": np.arange(nx)},
                       attrs={"line_time_s": line, "slow_direction": slow})
    np.testing.assert_array_equal(t_f, pixel_time_s(probe))
    k = np.floor(t_f[:, :1] / line)  # acquisition index of each row
    # backward: second half of the line, reverse fast-axis order: t_b = (2k+1)T − t_f
    np.testing.assert_allclose(t_b, (2 * k + 1) * line - t_f, rtol=0, atol=1e-12)
    assert np.all(np.diff(t_b, axis=1) < 0)
    assert np.all(t_b > t_f.max(axis=1, keepdims=True))
    assert np.all(t_b < (k + 1) * line)


@pytest.mark.parametrize("slow", ["increasing", "decreasing"])
def test_drift_moves_feature_by_minus_v_t(slow):
    xf, yf = 1.2e-9, -0.7e-9
    s = Surface(adsorbates=(Adsorbate(xf, yf, 2e-10, 6e-10),))
    v = np.array([2.0e-11, -1.5e-11])
    start = T0 + timedelta(seconds=250)
    nx = ny = 96
    size = 16e-9
    raw, truth = cc(s, nx=nx, ny=ny, size_x_m=size, run_t0=T0, start_time=start,
                    drift_velocity_m_per_s=tuple(v), slow_direction=slow, line_time_s=0.2)
    z = raw["z"].values - raw["z"].values.min()
    x, y = raw["x"].values, raw["y"].values
    w = np.where(z > 0.02 * z.max(), z, 0.0)
    cx = float((w * x[None, :]).sum() / w.sum())
    cy = float((w * y[:, None]).sum() / w.sum())
    # time at which the tip passed the feature: the pixel-time map is affine in the pixel
    # indices, so evaluate it at the centroid's fractional indices
    t = pixel_time_s(raw) + 250.0
    px = size / nx
    fi, fj = (cx - x[0]) / px, (cy - y[0]) / px
    ti = float(t[0, 0] + (t[0, 1] - t[0, 0]) * fi + (t[1, 0] - t[0, 0]) * fj)
    # DESIGN §4: features move by −v·t
    assert abs(cx - (xf - v[0] * ti)) < 0.1 * px
    assert abs(cy - (yf - v[1] * ti)) < 0.1 * px
    # the shift is large compared with the tolerance, so the check can fail
    assert math.hypot(*(v * ti)) > 20 * px
    # the drift-free truth has the feature at its true place
    ht = truth["height_true"].values
    assert float(x[np.argmax(ht.max(axis=0))]) == pytest.approx(xf, abs=px)


# ---- signs, saturation, artefacts --------------------------------------------------------------


def test_current_sign_follows_negative_bias():
    raw, truth = ch(terraced(), bias_V=-0.3)
    assert np.all(raw["current"].values < 0)
    assert raw.attrs["setpoint_A"] < 0 and truth.attrs["reference_current_A"] < 0
    rcc, _ = cc(terraced(), bias_V=-0.8, feedback_time_constant_s=2e-4)
    assert np.all(rcc["current"].values < 0) and rcc.attrs["setpoint_A"] == -1e-10
    validate_raw_frame(raw, source="sim")  # no SignError
    validate_raw_frame(rcc, source="sim")


def test_saturation_clips_at_current_limit():
    free, _ = ch(terraced(), reference_current_A=1e-9)
    limit = float(np.quantile(np.abs(free["current"].values), 0.8))
    raw, _ = ch(terraced(), reference_current_A=1e-9, current_limit_A=limit)
    cur = np.abs(raw["current"].values)
    assert cur.max() == limit
    assert np.sum(cur == limit) == np.sum(np.abs(free["current"].values) >= limit)
    assert raw.attrs["current_limit_A"] == limit
    neg, _ = ch(terraced(), bias_V=-0.1, reference_current_A=1e-9, current_limit_A=limit)
    assert neg["current"].values.min() == -limit


def test_noise_floor_scatters_around_zero():
    raw, _ = ch(terraced(), tip_height_m=2e-9, reference_current_A=1e-12,
                reference_gap_m=6e-10, noise_floor_A=1e-12, current_noise_fraction=0.0)
    cur = raw["current"].values
    assert np.any(cur < 0) and np.any(cur > 0)  # near the floor single negatives are data
    assert np.std(cur) == pytest.approx(1e-12, rel=0.1)  # 3072 samples: ±2.6 % (1σ)


def test_line_offsets_scars_and_tip_change():
    flat = Surface()
    raw, truth = cc(flat, line_offsets_m=5e-12, scars=4, tip_change_row=30, tip_change_m=1e-10)
    z = raw["z"].values
    mask = truth["scar_mask"].values.astype(bool)
    off = truth["line_offset"].values
    jump = np.where(np.arange(48) >= 30, 1e-10, 0.0)
    clean = off[:, None] + jump[:, None]
    # away from scars, z is the line offset plus the persistent tip-change jump
    np.testing.assert_allclose(z[~mask], np.broadcast_to(clean, z.shape)[~mask], atol=1e-20)
    assert np.all(np.abs(z[mask] - np.broadcast_to(clean, z.shape)[mask]) >= 0.5 * 1.5e-10 - 1e-20)
    runs = [np.diff(np.flatnonzero(np.diff(np.r_[0, r, 0]))) for r in mask.astype(int)]
    lengths = [int(x) for r in runs for x in r[::2]]
    # 4 streaks of 3–10 pixels (this seed draws them in 4 different places)
    assert len(lengths) == 4 and all(3 <= n <= 10 for n in lengths)
    # the backward trace has no scars
    np.testing.assert_allclose(raw["z_backward"].values, np.broadcast_to(clean, z.shape),
                               atol=1e-20)
    assert truth.attrs["tip_change_row"] == 30


def test_z_in_volts_matches_z_in_metres():
    s = terraced()
    rm, _ = cc(s, **NOISY)
    rv, _ = cc(s, **NOISY, z_units="V", piezo_z_m_per_V=2.5e-9)
    assert rv["z"].attrs["units"] == "V" and rv.attrs["piezo_z_m_per_V"] == 2.5e-9
    np.testing.assert_allclose(validate_raw_frame(rv, source="sim")["z"].values,
                               rm["z"].values, rtol=1e-13, atol=0)


def test_unrecorded_rows_are_nan_and_flagged_by_the_validator():
    raw, _ = cc(terraced(), unrecorded_rows=5, slow_direction="decreasing")
    assert np.all(np.isnan(raw["z"].values[:5])) and np.all(np.isfinite(raw["z"].values[5:]))
    v = validate_raw_frame(raw, source="sim")
    assert any("not recorded" in w for w in get_warnings(v))


def test_raw_frame_passes_contract_validation_float32():
    raw, truth = cc(terraced(), **NOISY, dtype="float32")
    assert raw["z"].dtype == np.float32
    v = validate_raw_frame(raw, source="sim")
    assert v.attrs["mode"] == "constant-current" and v.sizes == {"y": 48, "x": 64}
    np.testing.assert_array_equal(raw["x"].values, truth["x"].values)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [({"setpoint_A": 0.0}, "setpoint_A = 0.0 must be a positive magnitude"),
     ({"bias_V": 0.0}, "bias_V = 0.0 must be non-zero"),
     ({"z_units": "V"}, "needs a positive piezo_z_m_per_V"),
     ({"slow_direction": "up"}, "slow_direction = 'up'"),
     ({"tip_change_row": 99}, "tip_change_row = 99; allowed 0..47"),
     ({"start_time": T0, "run_t0": T0 + timedelta(seconds=1)}, "before the run start")])
def test_bad_parameters_raise_clear_errors(kwargs, match):
    with pytest.raises(ConfigError, match=match):
        cc(terraced(), **kwargs)
