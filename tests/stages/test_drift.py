"""Drift: frame-to-frame shifts, the drift model, intra-frame correction, up/down pairs.

Synthetic frames are sampled exactly where DESIGN.md §4 says the tip is: the pixel at nominal
position r, recorded at time t, shows the surface at r + v·t (our own surfaces: a periodic
Gaussian random field evaluated by cubic spline, plus a hexagonal lattice for the geometry
checks). Truths are therefore known to numerical precision.
"""

from __future__ import annotations

import itertools
import json
import math
from datetime import datetime, timedelta

import numpy as np
import pytest
import xarray as xr
from scipy import ndimage as ndi

from pipeline.errors import ProcessingError
from pipeline.model import Flag, get_history, make_height_frame, make_raw_frame, pixel_time_s
from pipeline.stages.drift import (
    DriftModel,
    correct_drift,
    drift_from_up_down_pair,
    drift_table,
    fit_drift_model,
    fit_drift_series,
    fit_z_drift,
    frame_times_s,
    m_per_s_to_nm_per_min,
    measure_frame_shift,
    model_from_table,
    nm_per_min_to_m_per_s,
    plan_frame_pairs,
    theil_sen,
)
from pipeline.stages.registration import register_images

RUN_START = datetime(2026, 3, 14, 22, 0, 0)


# --------------------------------------------------------------------------------------------
# synthetic surfaces and frames (test-only)
# --------------------------------------------------------------------------------------------


class RandomSurface:
    """Periodic Gaussian random field with a Lorentzian-like spectrum, evaluated anywhere.

    Built on a fine grid (``h`` = 0.04 nm, band limit 0.5 nm) and interpolated with a cubic
    spline, which is exact to ~1e-4 of the RMS at that oversampling.
    """

    def __init__(self, seed: int, *, period_m: float = 64e-9, h_m: float = 0.04e-9,
                 corr_m: float = 2e-9, rms_m: float = 30e-12, lmin_m: float = 0.5e-9) -> None:
        rng = np.random.default_rng(seed)
        n = round(period_m / h_m)
        k = np.fft.fftfreq(n, d=h_m)
        kk = np.hypot(k[:, None], k[None, :])
        amp = (kk < 1 / lmin_m) / (1 + (kk * corr_m) ** 2)
        f = np.fft.ifft2(np.fft.fft2(rng.normal(size=(n, n))) * amp).real
        f *= rms_m / f.std()
        self.h = h_m
        self.coef = ndi.spline_filter(f, order=3, mode="grid-wrap")

    def __call__(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return ndi.map_coordinates(self.coef, [y / self.h, x / self.h], order=3,
                                   mode="grid-wrap", prefilter=False)


class LatticeSurface:
    """Hexagonal lattice (constant ``a``) + weak random roughness + a few adsorbates."""

    def __init__(self, seed: int, *, a_m: float = 0.5e-9, corrugation_m: float = 20e-12,
                 angle_deg: float = 7.0) -> None:
        self.a = a_m
        k = 4 * math.pi / (math.sqrt(3) * a_m)
        th = math.radians(angle_deg) + np.arange(3) * 2 * math.pi / 3
        self.k = np.column_stack([k * np.cos(th), k * np.sin(th)])
        self.amp = corrugation_m
        self.rough = RandomSurface(seed, corr_m=3e-9, rms_m=15e-12, period_m=48e-9,
                                   h_m=0.06e-9, lmin_m=1e-9)
        rng = np.random.default_rng(seed + 1)
        self.ads = rng.uniform(-15e-9, 35e-9, size=(60, 2))

    def __call__(self, x: np.ndarray, y: np.ndarray) -> np.ndarray:
        z = self.rough(x, y)
        for kx, ky in self.k:
            z = z + self.amp * np.cos(kx * x + ky * y)
        for ax, ay in self.ads:
            z = z + 60e-12 * np.exp(-((x - ax) ** 2 + (y - ay) ** 2) / (2 * (0.4e-9) ** 2))
        return z


def make_frame(
    surface, *, drift_m_per_s=(0.0, 0.0), start_s: float = 0.0, n: int = 128,
    size_m: float = 20e-9, center_m=(0.0, 0.0), line_time_s: float = 1.0,
    slow_direction: str = "increasing", noise_m: float = 2e-12, seed: int = 0,
    frame_id: str = "f000", drift_fn=None,
) -> xr.Dataset:
    """A levelled height frame whose pixels sample ``surface(r + d(t))`` (DESIGN.md §4)."""
    attrs = {
        "mode": "constant-current", "bias_V": 0.5, "setpoint_A": 1e-10,
        "scan_size_x_m": size_m, "scan_size_y_m": size_m,
        "scan_center_x_m": center_m[0], "scan_center_y_m": center_m[1], "scan_angle_deg": 0.0,
        "line_time_s": line_time_s, "slow_direction": slow_direction, "frame_id": frame_id,
        "start_time": (RUN_START + timedelta(seconds=start_s)).isoformat(),
    }
    raw = make_raw_frame(z=np.zeros((n, n)), attrs=attrs)
    t = start_s + pixel_time_s(raw)
    xx, yy = np.meshgrid(raw["x"].values, raw["y"].values)
    if drift_fn is None:
        dx, dy = drift_m_per_s[0] * t, drift_m_per_s[1] * t
    else:
        dx, dy = drift_fn(t)
    z = surface(xx + dx, yy + dy)
    z = z + np.random.default_rng(seed).normal(0.0, noise_m, z.shape)
    return make_height_frame(raw, z, uncertainty=np.full(z.shape, noise_m))


def make_series(surface, v, *, n_frames=6, n=128, line_time_s=1.0, gap_s=5.0, noise_m=2e-12,
                **kw):
    frame_time = n * line_time_s
    return [make_frame(surface, drift_m_per_s=v, start_s=i * (frame_time + gap_s), n=n,
                       line_time_s=line_time_s, noise_m=noise_m, seed=i,
                       frame_id=f"f{i:03d}", **kw) for i in range(n_frames)]


@pytest.fixture(scope="module")
def rough() -> RandomSurface:
    return RandomSurface(11)


@pytest.fixture(scope="module")
def lattice() -> LatticeSurface:
    return LatticeSurface(5)


def lattice_geometry(height: np.ndarray, px_m: float, a_m: float) -> tuple[float, float]:
    """Worst angle error (deg, from 60°) and length error (relative) of the lattice vectors.

    The three strongest Fourier peaks near the lattice's reciprocal-vector length are located
    to sub-bin precision by a zoomed matrix DFT, and the real-space basis is their inverse.
    """
    h = np.asarray(height, dtype=float)
    ok = np.isfinite(h)
    ny, nx = h.shape
    w = np.outer(np.hanning(ny), np.hanning(nx))
    f = np.where(ok, h - h[ok].mean(), 0.0) * w
    spec = np.abs(np.fft.fft2(f))
    ky = np.fft.fftfreq(ny, d=px_m)
    kx = np.fft.fftfreq(nx, d=px_m)
    kk = np.hypot(ky[:, None], kx[None, :])
    k0 = 2 / (math.sqrt(3) * a_m)
    spec[(kk < 0.85 * k0) | (kk > 1.15 * k0)] = 0
    spec[(ky[:, None] < 0) | ((ky[:, None] == 0) & (kx[None, :] < 0))] = 0  # one half-plane
    peaks = []
    for _ in range(3):
        iy, ix = np.unravel_index(np.argmax(spec), spec.shape)
        peaks.append((ky[iy], kx[ix]))
        spec[np.hypot(ky[:, None] - ky[iy], kx[None, :] - kx[ix]) < 0.3 * k0] = 0
    yy = (np.arange(ny) + 0.5) * px_m
    xx = (np.arange(nx) + 0.5) * px_m
    g = []
    dk = 1.0 / (nx * px_m)
    offs = np.linspace(-1, 1, 41) * dk
    for qy, qx in peaks:
        ey = np.exp(-2j * np.pi * np.outer(qy + offs, yy))
        ex = np.exp(-2j * np.pi * np.outer(xx, qx + offs))
        zoom = np.abs(ey @ f @ ex)
        jy, jx = np.unravel_index(np.argmax(zoom), zoom.shape)
        sub = []
        for j, line in ((jy, zoom[:, jx]), (jx, zoom[jy, :])):
            d = 0.0
            if 0 < j < len(line) - 1:
                den = line[j - 1] - 2 * line[j] + line[j + 1]
                d = 0.5 * (line[j - 1] - line[j + 1]) / den if den < 0 else 0.0
            sub.append(offs[j] + d * (offs[1] - offs[0]))
        g.append((qx + sub[1], qy + sub[0]))
    g = np.array(g)  # rows: (kx, ky) cycles/m
    # choose two reciprocal vectors 60° apart (g1, g2) -> real basis with g_i·a_j = δ_ij
    best = None
    for i in range(3):
        for j in range(i + 1, 3):
            c = abs(g[i] @ g[j]) / np.linalg.norm(g[i]) / np.linalg.norm(g[j])
            if best is None or abs(c - 0.5) < best[0]:
                best = (abs(c - 0.5), i, j)
    _, i, j = best
    basis = np.linalg.inv(np.array([g[i], g[j]]))  # columns a1, a2
    a1, a2 = basis[:, 0], basis[:, 1]
    a3 = a1 + a2 if a1 @ a2 < 0 else a1 - a2
    vecs = [a1, a2, a3]
    lengths = np.array([np.linalg.norm(v) for v in vecs])
    angles = []
    for p in range(3):
        for q in range(p + 1, 3):
            c = abs(vecs[p] @ vecs[q]) / lengths[p] / lengths[q]
            angles.append(math.degrees(math.acos(min(1.0, c))))
    return float(np.max(np.abs(np.array(angles) - 60.0))), float(np.max(np.abs(lengths / a_m - 1)))


def true_feature_shift_m(v, dt_start_s, line_time_s, n, size_m):
    """Exact feature displacement between two frames of the same raster under constant drift.

    With the raster clock τ(r) = τ_x·x + τ_y·y, a pixel at r shows the surface at
    M·r + v·t0 with M = I + v ⊗ ∇τ (DESIGN.md §4), so the later frame equals the earlier one
    displaced by s = −M⁻¹·v·Δt0 (features move against the drift, stretched by M).
    """
    px = size_m / n
    grad_tau = np.array([0.5 * line_time_s / n / px, line_time_s / px])  # s/m (x, y)
    m = np.eye(2) + np.outer(v, grad_tau)
    return -np.linalg.solve(m, np.asarray(v) * dt_start_s)


# --------------------------------------------------------------------------------------------
# conventions and small helpers
# --------------------------------------------------------------------------------------------


def test_rate_conversion():
    # 1 nm/min = 1e-9 m / 60 s (definition)
    assert nm_per_min_to_m_per_s(1.0) == pytest.approx(1e-9 / 60)
    assert m_per_s_to_nm_per_min(1e-9 / 60) == pytest.approx(1.0)


def test_frame_times(rough):
    ds = make_frame(rough, start_s=100.0, n=64, line_time_s=0.5)
    t0, tm = frame_times_s(ds, run_start=RUN_START)
    # mean of the raster clock: rows (n−1)/2 line times, forward trace half a line (common
    # practice of the model: FORWARD_FRACTION = 0.5) → mean fast offset 0.25 line times
    assert t0 == pytest.approx(100.0)
    assert tm == pytest.approx(100.0 + 31.5 * 0.5 + 0.25 * 0.5)


def test_sign_convention_follows_design_section_4(rough):
    # DESIGN.md §4: the pixel at nominal r recorded at t shows the surface at r + v·t, so image
    # features move by −v·t. A tip drifting towards +x makes the surface appear to move to −x.
    v = (nm_per_min_to_m_per_s(1.0), 0.0)
    a = make_frame(rough, drift_m_per_s=v, start_s=0.0, n=128, frame_id="a")
    b = make_frame(rough, drift_m_per_s=v, start_s=200.0, n=128, frame_id="b", seed=1)
    shift = measure_frame_shift(a, b)
    assert shift.dx_m < 0 and abs(shift.dy_m) < 0.05 * abs(shift.dx_m)
    assert shift.dx_m == pytest.approx(-v[0] * shift.dt_s, rel=0.01)
    model = fit_drift_series([frame_times_s(d, run_start=RUN_START)[1] for d in (a, b)], [shift])
    assert model.velocity_x_m_per_s == pytest.approx(v[0], rel=0.01)  # tip velocity, + sign
    # and the correction puts the surface back where it was at the run start
    corrected = correct_drift(b, model=model, frame_t0_s=200.0)
    truth = make_frame(rough, n=128, noise_m=0.0)["height"].values  # the surface at t = 0
    ok = np.isfinite(corrected["height"].values)
    left = register_images(truth, corrected["height"].values, moving_mask=ok)
    assert abs(left.shift_x_px) < 0.05 and abs(left.shift_y_px) < 0.05
    # pixels with no recorded source lie on the −x side: the tip had moved to +x
    assert not ok[:, 0].any() and ok[:, -1].all()


# --------------------------------------------------------------------------------------------
# frame-to-frame shifts
# --------------------------------------------------------------------------------------------


def test_successive_256_frames_within_005_px(rough):
    # realistic: 20 nm frames of 256 px, 1 s lines (4.3 min frames), 1 nm/min, 2 pm noise
    n, lt, size = 256, 1.0, 20e-9
    v = nm_per_min_to_m_per_s(1.0) * np.array([0.6, 0.8])
    frames = make_series(rough, v, n_frames=4, n=n, line_time_s=lt)
    px = size / n
    errors = []
    for a, b in itertools.pairwise(frames):
        dt0 = (parse_iso(b) - parse_iso(a))
        s = measure_frame_shift(a, b)
        truth = true_feature_shift_m(v, dt0, lt, n, size)
        errors.append((np.array([s.dx_m, s.dy_m]) - truth) / px)
    rms = math.sqrt(np.mean(np.square(errors)))
    print(f"shift error RMS {rms:.4f} px over {len(errors)} pairs of 256 x 256")
    assert rms < 0.05  # brief: 0.05 px RMS at realistic noise


def parse_iso(ds: xr.Dataset) -> float:
    return (datetime.fromisoformat(ds.attrs["start_time"]) - RUN_START).total_seconds()


@pytest.mark.parametrize("rate_nm_per_min", [0.05, 0.2, 1.0, 2.0])
def test_fitted_velocity_within_3_percent(rough, rate_nm_per_min):
    # 20 nm frames, 128 px, 1 s lines: 2.1 min per frame, 6 frames
    v = nm_per_min_to_m_per_s(rate_nm_per_min) * np.array([0.8, -0.6])
    frames = make_series(rough, v, n_frames=6)
    times = [frame_times_s(f, run_start=RUN_START)[1] for f in frames]
    shifts = [measure_frame_shift(a, b) for a, b in itertools.pairwise(frames)]
    model = fit_drift_series(times, shifts, frame_ids=[f.attrs["frame_id"] for f in frames])
    fitted = np.array([model.velocity_x_m_per_s, model.velocity_y_m_per_s])
    err = float(np.linalg.norm(fitted - v) / np.linalg.norm(v))
    print(f"{rate_nm_per_min} nm/min: velocity error {100 * err:.3f} % "
          f"(fitted {model.velocity_nm_per_min[0]:+.4f}, {model.velocity_nm_per_min[1]:+.4f})")
    assert err < 0.03  # brief: within 3 % of the truth
    assert model.n_used == 5 and not model.warnings


def test_window_move_is_not_drift(rough):
    # the operator moves the window by (3, −2) nm before frame 3; only the drift remains
    v = nm_per_min_to_m_per_s(0.5) * np.array([1.0, 0.3])
    frames = []
    for i in range(5):
        center = (3e-9, -2e-9) if i >= 3 else (0.0, 0.0)
        frames.append(make_frame(rough, drift_m_per_s=v, start_s=i * 133.0, center_m=center,
                                 seed=i, frame_id=f"f{i}"))
    shifts = [measure_frame_shift(a, b) for a, b in itertools.pairwise(frames)]
    moved = shifts[2]
    assert moved.window_shift_x_m == pytest.approx(3e-9)
    assert moved.dx_m == pytest.approx(-v[0] * moved.dt_s, rel=0.03)  # not −3 nm
    times = [frame_times_s(f, run_start=RUN_START)[1] for f in frames]
    model = fit_drift_series(times, shifts)
    assert model.velocity_x_m_per_s == pytest.approx(v[0], rel=0.03)
    assert model.velocity_y_m_per_s == pytest.approx(v[1], rel=0.03)


def test_featureless_frame_is_excluded_with_a_warning(rough):
    v = nm_per_min_to_m_per_s(0.5) * np.array([0.8, -0.6])
    frames = make_series(rough, v, n_frames=6)
    noisy = frames[3].copy()
    noisy["height"] = (("y", "x"), np.random.default_rng(9).normal(
        0, 30e-12, noisy["height"].shape).astype(np.float32))
    frames[3] = noisy
    times = [frame_times_s(f, run_start=RUN_START)[1] for f in frames]
    shifts = [measure_frame_shift(a, b) for a, b in itertools.pairwise(frames)]
    assert shifts[2].confidence < 0.3 and shifts[3].confidence < 0.3
    model = fit_drift_series(times, shifts, frame_ids=[f.attrs["frame_id"] for f in frames])
    assert model.used == (True, True, False, False, True)
    assert any("f002 → f003" in w and "low registration confidence" in w
               for w in model.warnings)
    fitted = np.array([model.velocity_x_m_per_s, model.velocity_y_m_per_s])
    assert np.linalg.norm(fitted - v) < 0.03 * np.linalg.norm(v)  # no wild value


def test_frames_of_different_areas(rough):
    a = make_frame(rough, frame_id="a")
    far = make_frame(rough, start_s=140.0, center_m=(40e-9, 0.0), frame_id="far")
    refused = measure_frame_shift(a, far)
    assert refused.confidence == 0 and "do not overlap" in refused.reason
    other = make_frame(RandomSurface(99), start_s=140.0, frame_id="other")  # same window
    low = measure_frame_shift(a, other)
    assert low.confidence < 0.3
    model = fit_drift_series([60.0, 200.0, 340.0], [refused, low])
    assert not model.is_usable and model.kind == "none"
    assert any("do not overlap" in w for w in model.warnings)
    assert any("no usable frame pairs" in w for w in model.warnings)


def test_different_pixel_sizes_are_refused(rough):
    a = make_frame(rough, n=128, frame_id="a")
    b = make_frame(rough, n=64, start_s=140.0, frame_id="b")
    s = measure_frame_shift(a, b)
    assert s.confidence == 0 and "pixel sizes differ" in s.reason


def test_tip_change_pair_excluded(rough):
    v = nm_per_min_to_m_per_s(0.5) * np.array([1.0, 0.0])
    frames = make_series(rough, v, n_frames=4)
    flags = frames[2]["flags"].values.copy()
    flags[80:, :] |= int(Flag.TIP_CHANGE)
    frames[2] = frames[2].assign(flags=(("y", "x"), flags, dict(frames[2]["flags"].attrs)))
    times = [frame_times_s(f, run_start=RUN_START)[1] for f in frames]
    shifts = [measure_frame_shift(a, b) for a, b in itertools.pairwise(frames)]
    assert [s.tip_change for s in shifts] == [False, True, True]
    model = fit_drift_series(times, shifts)
    assert model.used == (True, False, False)
    assert "tip change" in model.reasons[1]


def test_measure_frame_shift_does_not_mutate(rough):
    a = make_frame(rough, frame_id="a")
    b = make_frame(rough, drift_m_per_s=(1e-11, 0.0), start_s=140.0, frame_id="b")
    a0, b0 = a.copy(deep=True), b.copy(deep=True)
    measure_frame_shift(a, b)
    xr.testing.assert_identical(a, a0)
    xr.testing.assert_identical(b, b0)


# --------------------------------------------------------------------------------------------
# drift model
# --------------------------------------------------------------------------------------------


def test_outlier_pair_is_rejected():
    t = np.arange(8) * 130.0 + 65.0
    v = 1e-11
    dx = -v * np.diff(t)
    dx[4] += 2e-9  # a wrong match with high confidence
    model = fit_drift_model(t, dx, np.zeros(7), uncertainties_m=2e-12, confidence=np.ones(7))
    assert model.used == (True, True, True, True, False, True, True)
    assert "outlier" in model.reasons[4]
    assert model.velocity_x_m_per_s == pytest.approx(v, rel=1e-6)


def test_smooth_model_follows_decaying_drift():
    # creep after cool-down: d(t) = A (1 − exp(−t/τ)) + v∞ t (a common empirical form)
    amp, tau, vinf = 20e-9, 3600.0, 1e-12
    t = np.linspace(300, 4 * 3600, 40)
    d = amp * (1 - np.exp(-t / tau)) + vinf * t
    inc = np.diff(d)
    kw = {"uncertainties_m": 5e-12, "confidence": np.ones(39)}
    smooth = fit_drift_model(t, -inc, np.zeros(39), model="smooth", smooth_degree=4, **kw)
    const = fit_drift_model(t, -inc, np.zeros(39), model="constant", **kw)
    grid = np.linspace(t[0], t[-1], 50)
    true_v = amp / tau * np.exp(-grid / tau) + vinf
    err_s = np.max(np.abs(smooth.velocity_m_per_s(grid)[0] - true_v)) / true_v.max()
    err_c = np.max(np.abs(const.velocity_m_per_s(grid)[0] - true_v)) / true_v.max()
    print(f"max velocity error: smooth {100 * err_s:.2f} %, constant {100 * err_c:.1f} %")
    assert err_s < 0.05 < err_c
    # positions are referenced to the run start: d(0) = 0
    assert smooth.position_m(0.0)[0] == 0.0


def test_fit_drift_model_rejects_bad_input():
    with pytest.raises(ProcessingError, match="3 frame times for 3 consecutive pairs"):
        fit_drift_model([0, 1, 2], [0, 0, 0], [0, 0, 0], uncertainties_m=1.0,
                        confidence=[1, 1, 1])
    with pytest.raises(ProcessingError, match="model = 'linear'"):
        fit_drift_model([0, 1], [0], [0], uncertainties_m=1.0, confidence=[1], model="linear")


def test_z_drift_is_robust_to_a_tip_change():
    # Theil–Sen slope (Sen 1968): a step in the mean height at a tip change barely moves it
    t = np.arange(12) * 120.0
    h = 2e-10 + 3e-13 * t
    h[8:] += 1e-10  # tip change
    z = fit_z_drift(t, h)
    clean = np.polyfit(t[:8], h[:8], 1)[0]  # numpy least squares on the clean part
    assert z.rate_m_per_s == pytest.approx(clean, rel=0.35)
    assert z.rate_nm_per_min == pytest.approx(m_per_s_to_nm_per_min(z.rate_m_per_s))
    assert math.isnan(fit_z_drift([0.0, 1.0], [0.0, 1.0]).rate_m_per_s)


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("confidence", [0.6827, 0.95])
def test_theil_sen_matches_scipy(seed, confidence):
    """Reference library: scipy.stats.theilslopes, with and without ties in x and y."""
    from scipy import stats

    rng = np.random.default_rng(seed)
    n = int(rng.integers(3, 40))
    x = rng.normal(size=n) if seed % 2 else rng.integers(0, 6, n).astype(float)  # ties
    y = 0.3 * x + rng.standard_t(2, n)
    if seed == 4:
        y = np.round(y)  # ties in y too
    ref = stats.theilslopes(y, x, alpha=confidence)
    got = theil_sen(x, y, confidence=confidence)
    np.testing.assert_allclose(got, (ref.slope, ref.intercept, ref.low_slope, ref.high_slope),
                               rtol=1e-12, atol=1e-12)


def test_drift_table_round_trip(rough, tmp_path):
    v = nm_per_min_to_m_per_s(0.5) * np.array([0.8, -0.6])
    frames = make_series(rough, v, n_frames=4)
    ids = [f.attrs["frame_id"] for f in frames]
    times = [frame_times_s(f, run_start=RUN_START)[1] for f in frames]
    shifts = [measure_frame_shift(a, b) for a, b in itertools.pairwise(frames)]
    model = fit_drift_series(times, shifts, frame_ids=ids)
    table = drift_table(ids, times, shifts, model, z_drift=fit_z_drift(times, [0, 1e-12, 2e-12,
                                                                                 3e-12]))
    assert table.attrs["drift_velocity_x_m_per_s"] == model.velocity_x_m_per_s
    assert table.attrs["drift_rate_x_nm_per_min"] == pytest.approx(0.8 * 0.5, rel=0.03)
    # measured positions follow the model within their uncertainty (+ the model's)
    res = table["drift_position_x_m"].values - table["drift_model_x_m"].values
    assert np.all(np.abs(res) < 0.02e-9)
    path = tmp_path / "run.nc"
    table.to_netcdf(path, engine="h5netcdf")
    with xr.open_dataset(path, engine="h5netcdf") as back:
        back = back.load()
    rebuilt = model_from_table(back)
    assert rebuilt.velocity_x_m_per_s == pytest.approx(model.velocity_x_m_per_s, rel=1e-12)
    assert list(back["drift_frame_id"].values) == ids
    assert json.loads(back.attrs["drift_warnings"]) == []


# --------------------------------------------------------------------------------------------
# intra-frame correction
# --------------------------------------------------------------------------------------------


def test_lattice_is_restored_by_the_correction(lattice):
    # 1 nm/min over 2.1 min frames shears and stretches a 20 nm frame by ~10 %
    n, lt, size = 256, 0.5, 20e-9
    v = nm_per_min_to_m_per_s(1.0) * np.array([0.8, -0.6])
    frames = make_series(lattice, v, n_frames=4, n=n, line_time_s=lt)
    times = [frame_times_s(f, run_start=RUN_START)[1] for f in frames]
    shifts = [measure_frame_shift(a, b) for a, b in itertools.pairwise(frames)]
    model = fit_drift_series(times, shifts)
    assert model.n_used == 3
    px = size / n
    ds = frames[2]
    t0 = frame_times_s(ds, run_start=RUN_START)[0]
    raw = lattice_geometry(ds["height"].values, px, lattice.a)
    fixed = lattice_geometry(correct_drift(ds, model=model, frame_t0_s=t0,
                                           reference="frame-mid")["height"].values, px, lattice.a)
    absolute = lattice_geometry(correct_drift(ds, model=model, frame_t0_s=t0)["height"].values,
                                px, lattice.a)
    print(f"lattice angle error: raw {raw[0]:.3f} deg, corrected {fixed[0]:.4f} deg "
          f"(run-start reference {absolute[0]:.4f} deg); length error raw {100 * raw[1]:.2f} %, "
          f"corrected {100 * fixed[1]:.3f} %")
    assert fixed[0] < 0.3 and absolute[0] < 0.3  # brief: within 0.3° of 60°
    assert fixed[1] < 0.005 and absolute[1] < 0.005  # brief: lengths within 0.5 %
    assert raw[0] > 10 * fixed[0] and raw[0] > 1.0  # visibly sheared before
    assert raw[1] > 0.02


def test_correct_drift_keeps_grid_and_flags_outside(rough):
    v = (nm_per_min_to_m_per_s(2.0), 0.0)
    ds = make_frame(rough, drift_m_per_s=v, start_s=300.0)
    model = DriftModel.constant(*v)
    before = ds.copy(deep=True)
    out = correct_drift(ds, model=model, frame_t0_s=300.0)
    xr.testing.assert_identical(ds, before)  # input not mutated
    assert out["height"].shape == ds["height"].shape
    np.testing.assert_array_equal(out["x"].values, ds["x"].values)
    np.testing.assert_array_equal(out["y"].values, ds["y"].values)
    outside = (out["flags"].values & int(Flag.OUTSIDE)) != 0
    # the tip moved +x by d = v·t, so the frame recorded the surface from x0 + d to x1 + d:
    # at run-start positions the strip [x0, x0 + d] on the −x side was never recorded
    t_mid = frame_times_s(ds, run_start=RUN_START)[1]
    for k in range(0, 128, 9):  # each line at its own time: the strip widens down the frame
        cols = v[0] * (300.0 + k * 1.0) / (20e-9 / 128)
        assert outside[k, : int(cols) - 1].all() and not outside[k, int(cols) + 2:].any()
    assert np.isnan(out["height"].values[outside]).all()
    assert out.attrs["drift_corrected"] == 1
    assert out.attrs["drift_shift_x_m"] == pytest.approx(v[0] * t_mid)
    assert out["height"].dtype == np.float32
    assert get_history(out)[-1]["stage"] == "correct_drift"
    assert np.isfinite(out["height_uncertainty"].values[~outside]).all()


def test_correct_drift_with_unusable_model(rough):
    ds = make_frame(rough)
    none = fit_drift_model([0.0, 1.0], [np.nan], [np.nan], uncertainties_m=1.0, confidence=[0])
    out = correct_drift(ds, model=none, frame_t0_s=0.0)
    assert out.attrs["drift_corrected"] == 0
    assert any("not corrected" in w for w in json.loads(out.attrs["warnings"]))
    np.testing.assert_array_equal(out["height"].values, ds["height"].values)


def test_unmeasured_drift_is_nan_not_zero():
    # a model fitted to no usable pair holds zero coefficients (it corrects nothing); its
    # velocity is not a measured zero, so the run table and the summaries must say NaN
    none = fit_drift_model([0.0, 1.0, 2.0], [np.nan, 1e-9], [np.nan, 2e-9], uncertainties_m=1.0,
                           confidence=[0.0, 0.1])
    assert not none.is_usable
    assert math.isnan(none.velocity_x_m_per_s) and math.isnan(none.velocity_y_m_per_s)
    table = drift_table(["a", "b", "c"], [0.0, 1.0, 2.0], [], none)
    for key in ("drift_velocity_x_m_per_s", "drift_rate_y_nm_per_min", "drift_rate_nm_per_min"):
        assert math.isnan(table.attrs[key])


def test_many_exclusions_are_grouped_by_reason():
    # a run of 8 frames whose 7 pairs all fail would otherwise print 7 near-identical lines
    # and bury the message that matters (drift not measured): common practice for batch logs
    t = np.arange(8.0)
    none = fit_drift_model(t, np.full(7, 1e-9), np.full(7, 1e-9), uncertainties_m=1e-11,
                           confidence=[0.1] * 6 + [0.9], tip_change=[False] * 6 + [True])
    assert none.warnings[0] == ("6 of 7 pairs excluded from the drift model: low registration "
                                "confidence (pair 0 (frames 0 → 1), pair 1 (frames 1 → 2), …; "
                                "each pair's reason is in the drift table)")
    assert none.warnings[1].startswith("1 of 7 pairs excluded from the drift model: tip change")
    assert "drift not measured" in none.warnings[2]
    assert len(none.warnings) == 3
    # the full reason of each pair is kept
    assert none.reasons[0] == "low registration confidence (0.10 < 0.30)"
    # a few exclusions are still named one by one
    few = fit_drift_model(t, np.full(7, 1e-9), np.full(7, 1e-9), uncertainties_m=1e-11,
                          confidence=[0.1] + [0.9] * 6)
    assert few.warnings == ("pair 0 (frames 0 → 1): excluded from the drift model: low "
                            "registration confidence (0.10 < 0.30)",)


def test_correct_drift_bad_options(rough):
    ds = make_frame(rough, n=32)
    with pytest.raises(ProcessingError, match="order = 2"):
        correct_drift(ds, model=DriftModel.constant(0, 0), frame_t0_s=0.0, order=2)
    with pytest.raises(ProcessingError, match="reference = 'now'"):
        correct_drift(ds, model=DriftModel.constant(0, 0), frame_t0_s=0.0, reference="now")


def test_cubic_correction_handles_missing_rows(rough):
    v = (nm_per_min_to_m_per_s(0.5), 0.0)
    ds = make_frame(rough, drift_m_per_s=v, n=64)
    h = ds["height"].values.copy()
    h[50:, :] = np.nan  # scan stopped early
    ds = ds.assign(height=(("y", "x"), h, dict(ds["height"].attrs)))
    out = correct_drift(ds, model=DriftModel.constant(*v), frame_t0_s=0.0, order=3)
    # NaN does not spread through the spline: only the missing rows (± the shift) stay NaN
    assert np.isfinite(out["height"].values[:48, 2:]).all()
    assert np.isnan(out["height"].values[52:, :]).all()


# --------------------------------------------------------------------------------------------
# up/down pairs
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize("rate_nm_per_min", [0.2, 1.0])
def test_up_down_pair_velocity(rough, rate_nm_per_min):
    v = nm_per_min_to_m_per_s(rate_nm_per_min) * np.array([0.8, -0.6])
    up = make_frame(rough, drift_m_per_s=v, frame_id="up")
    down = make_frame(rough, drift_m_per_s=v, start_s=133.0, slow_direction="decreasing",
                      frame_id="down", seed=1)
    est = drift_from_up_down_pair(up, down)
    fitted = np.array([est.velocity_x_m_per_s, est.velocity_y_m_per_s])
    err = np.linalg.norm(fitted - v) / np.linalg.norm(v)
    print(f"up/down {rate_nm_per_min} nm/min: error {100 * err:.2f} % "
          f"(uncertainty {100 * est.uncertainty_x_m_per_s / np.linalg.norm(v):.2f} %)")
    assert err < 0.03
    assert np.all(np.abs(fitted - v) < 4 * np.array([est.uncertainty_x_m_per_s,
                                                     est.uncertainty_y_m_per_s]))


def test_up_down_pair_needs_opposite_directions(rough):
    a = make_frame(rough, frame_id="a")
    with pytest.raises(ProcessingError, match="same slow_direction 'increasing'"):
        drift_from_up_down_pair(a, make_frame(rough, start_s=133.0, frame_id="b"))


def test_plan_frame_pairs_skips_other_series():
    big = {"nx": 128, "ny": 128, "scan_size_x_m": 25e-9, "scan_size_y_m": 25e-9}
    small = {"nx": 64, "ny": 64, "scan_size_x_m": 4e-9, "scan_size_y_m": 4e-9}
    moved = {**big, "scan_center_x_m": 4e-9}
    away = {**big, "scan_center_x_m": 60e-9}
    frames = [big, small, big, moved, small, away, big]
    assert plan_frame_pairs(frames) == [(0, 2), (2, 3), (1, 4), (3, 6)]
