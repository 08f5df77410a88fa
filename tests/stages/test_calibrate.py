"""Calibration against known synthetic answers (pipeline.stages.calibrate, .lattice)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import xarray as xr
from ase.data import atomic_numbers, reference_states

from pipeline.errors import ProcessingError
from pipeline.model import get_history, make_height_frame, make_raw_frame
from pipeline.stages.calibrate import scale_height, scale_lateral, z_scale_from_steps
from pipeline.stages.lattice import LatticeCalibration, measure_lattice
from pipeline.stages.level import level_terraces

# Cubic lattice constants from ase reference data; fcc(111) monatomic step a/sqrt(3) and
# surface nearest-neighbour distance a/sqrt(2) (crystal geometry).
A_AU_M = reference_states[atomic_numbers["Au"]]["a"] * 1e-10
A_CU_M = reference_states[atomic_numbers["Cu"]]["a"] * 1e-10
STEP_AU_M = A_AU_M / math.sqrt(3)
NN_AU_M = A_AU_M / math.sqrt(2)
NN_CU_M = A_CU_M / math.sqrt(2)


def frame(height: np.ndarray, size_m: float, unc_m: float = 3e-12) -> xr.Dataset:
    ny, nx = height.shape
    raw = make_raw_frame(z=np.zeros((ny, nx)), attrs={
        "mode": "constant-current", "bias_V": 0.5, "setpoint_A": 1e-10,
        "scan_size_x_m": size_m, "scan_size_y_m": size_m, "scan_center_x_m": 5e-9,
        "scan_center_y_m": -3e-9, "line_time_s": 0.1, "start_time": "2031-05-04T22:10:00",
        "frame_id": "cal"})
    return make_height_frame(raw, height, uncertainty=np.full((ny, nx), unc_m))


def grid(n: int, size_m: float) -> tuple[np.ndarray, np.ndarray]:
    c = (np.arange(n) + 0.5 - n / 2) * size_m / n
    return np.meshgrid(c, c)


def hexagonal(xt: np.ndarray, yt: np.ndarray, *, a_m: float, angle_deg: float,
              p2v_m: float = 20e-12) -> np.ndarray:
    """Three-cosine hexagonal corrugation of period a_m in true coordinates."""
    g = 2 / (math.sqrt(3) * a_m)  # first-order reciprocal vectors (crystal geometry)
    out = sum(np.cos(2 * math.pi * g * (xt * math.cos(t) + yt * math.sin(t)))
              for t in np.radians(angle_deg + 90 + np.array([0, 60, 120])))
    return p2v_m * (out + 1.5) / 4.5


def lattice_frame(*, sx: float, sy: float, skew_deg: float, angle_deg: float, a_m: float,
                  n: int = 256, size_m: float = 8e-9, seed: int = 0) -> xr.Dataset:
    """Frame whose nominal coordinates map to true ones by [[sx, sy sin g], [0, sy cos g]]."""
    rng = np.random.default_rng(seed)
    x, y = grid(n, size_m)
    g = math.radians(skew_deg)
    xt, yt = sx * x + sy * math.sin(g) * y, sy * math.cos(g) * y
    h = (hexagonal(xt, yt, a_m=a_m, angle_deg=angle_deg) + 4e-3 * x - 2e-3 * y
         + 3e-12 * rng.standard_normal(x.shape))
    return frame(h, size_m)


# --------------------------------------------------------------------------------------------
# z scale
# --------------------------------------------------------------------------------------------


def test_z_scale_from_steps_weighted_mean() -> None:
    h = np.array([0.2310e-9, 0.2330e-9, 0.2290e-9, np.nan])  # last frame had no steps
    u = np.array([1e-12, 2e-12, 1e-12, np.nan])
    scale, su = z_scale_from_steps(h, u, known_step_height_m=STEP_AU_M)
    # inverse-variance weighted mean and Birge-inflated uncertainty, by hand (common practice;
    # Birge, Phys. Rev. 40, 207 (1932))
    w = 1 / u[:3] ** 2
    mean = np.sum(w * h[:3]) / np.sum(w)
    chi2 = np.sum(w * (h[:3] - mean) ** 2) / 2
    u_mean = math.sqrt(1 / np.sum(w)) * math.sqrt(max(chi2, 1.0))
    assert scale == pytest.approx(STEP_AU_M / mean, rel=1e-12)
    assert su == pytest.approx(scale * u_mean / mean, rel=1e-12)
    assert chi2 > 1  # the example does scatter more than its uncertainties


def test_z_scale_rejects_outliers_and_bad_input() -> None:
    h = np.array([0.2350e-9, 0.2352e-9, 0.2348e-9, 0.4710e-9])  # last: a double step
    u = np.full(4, 0.5e-12)
    scale, _ = z_scale_from_steps(h, u, known_step_height_m=STEP_AU_M)
    assert scale == pytest.approx(STEP_AU_M / 0.2350e-9, rel=1e-6)
    kept_all, _ = z_scale_from_steps(h, u, known_step_height_m=STEP_AU_M,
                                     outlier_threshold_sigma=None)
    assert kept_all < 0.9 * scale
    with pytest.raises(ProcessingError, match="no usable step height"):
        z_scale_from_steps([np.nan], [np.nan], known_step_height_m=STEP_AU_M)
    with pytest.raises(ProcessingError, match="uncertainties must be positive"):
        z_scale_from_steps([2.3e-10], [0.0], known_step_height_m=STEP_AU_M)
    with pytest.raises(ProcessingError, match="2 step heights but 1 uncertainties"):
        z_scale_from_steps([2.3e-10, 2.4e-10], [1e-12], known_step_height_m=STEP_AU_M)
    with pytest.raises(ProcessingError, match=r"known_step_height_m = -1\.0 must be a positive"):
        z_scale_from_steps([2.3e-10], [1e-12], known_step_height_m=-1.0)


def test_scale_height_propagates_uncertainty() -> None:
    x, _ = grid(32, 10e-9)
    ds = frame(1e-10 + 1e-2 * x, 10e-9)
    ds.attrs.update({"step_height_m": 2.2e-10, "step_height_uncertainty_m": 1e-12,
                     "terrace_offsets_m": np.array([0.0, 2.2e-10]), "tilt_x_rad": 0.01,
                     "scan_size_x_m": 10e-9, "tip_jumps_m": np.array([1e-10]),
                     "tip_jump_uncertainties_m": np.array([5e-12]),
                     "line_slopes": np.array([1e-3, -2e-3])})
    before = ds.copy(deep=True)
    out = scale_height(ds, factor=1.05, factor_uncertainty=0.01)
    xr.testing.assert_identical(ds, before)
    h = ds["height"].values.astype(float)
    np.testing.assert_allclose(out["height"].values, (1.05 * h).astype(np.float32))
    # first-order propagation: u^2 = (f u_h)^2 + (h u_f)^2 (GUM, JCGM 100:2008, eq. 10)
    exp_u = np.sqrt((1.05 * 3e-12) ** 2 + (h * 0.01) ** 2)
    np.testing.assert_allclose(out["height_uncertainty"].values, exp_u, rtol=1e-6)
    a = out.attrs
    assert a["step_height_m"] == pytest.approx(1.05 * 2.2e-10)
    assert a["step_height_uncertainty_m"] == pytest.approx(math.hypot(1.05e-12, 2.2e-12))
    np.testing.assert_allclose(a["terrace_offsets_m"], [0.0, 1.05 * 2.2e-10])
    assert a["tilt_x_rad"] == pytest.approx(math.atan(1.05 * math.tan(0.01)))
    assert a["scan_size_x_m"] == 10e-9  # lateral sizes are not heights
    np.testing.assert_allclose(a["tip_jumps_m"], [1.05e-10])
    np.testing.assert_allclose(a["tip_jump_uncertainties_m"], [math.hypot(1.05 * 5e-12, 1e-12)])
    np.testing.assert_allclose(a["line_slopes"], [1.05e-3, -2.1e-3])  # height per length
    np.testing.assert_allclose(scale_lateral(ds, scale_x=1.25, scale_y=1.0).attrs["line_slopes"],
                               [0.8e-3, -1.6e-3])
    assert a["z_scale_factor"] == pytest.approx(1.05)
    again = scale_height(out, factor=2.0)
    assert again.attrs["z_scale_factor"] == pytest.approx(2.1)
    assert again.attrs["z_scale_factor_uncertainty"] == pytest.approx(2.1 * 0.01 / 1.05)
    assert get_history(again)[-1]["stage"] == "scale_height"
    with pytest.raises(ProcessingError, match=r"frame cal: scale_height: factor = 0 must be"):
        scale_height(ds, factor=0)
    with pytest.raises(ProcessingError, match="factor_uncertainty = -1 must be >= 0"):
        scale_height(ds, factor=1.0, factor_uncertainty=-1)


def test_every_length_of_a_finished_frame_follows_its_calibration(sample_calibrated) -> None:
    # A scale factor multiplies every length along its axis (its definition): heights and
    # height-valued results by the z factor, lateral lengths and velocities by the lateral
    # factor of their axis, slopes along x by z / x. Every length-valued attribute of the
    # finished sample frames (tip change, drift, both calibrations) must be one of these, so a
    # new attribute cannot be forgotten.
    from pipeline.io.store import open_store
    from pipeline.stages import calibrate as C

    store, _, _ = sample_calibrated
    st = open_store(store)
    z_set = set(C._HEIGHT_ATTRS) | {u for _, u in C._HEIGHT_UNCERTAINTIES}
    seen: set[str] = set()
    for fid in st.frame_ids:
        ds = st.frame(fid)
        lengths = {k for k, v in ds.attrs.items() if k.endswith(("_m", "_m_per_s"))
                   and np.asarray(v).dtype.kind == "f"}
        assert lengths <= z_set | set(C._LATERAL_X) | set(C._LATERAL_Y), fid
        seen |= lengths
        z = scale_height(ds, factor=1.1)
        lat = scale_lateral(ds, scale_x=1.2, scale_y=0.8)
        for k in lengths:
            v = np.asarray(ds.attrs[k], dtype=float)
            fz = 1.1 if k in z_set else 1.0
            fl = 1.2 if k in C._LATERAL_X else 0.8 if k in C._LATERAL_Y else 1.0
            np.testing.assert_allclose(z.attrs[k], fz * v, rtol=1e-12, err_msg=k)
            np.testing.assert_allclose(lat.attrs[k], fl * v, rtol=1e-12, err_msg=k)
    # the attributes this guards were all present
    assert {"Sq_m", "tip_jumps_m", "height_noise_m", "drift_displacement_x_m"} <= seen


def test_z_calibration_from_known_step_end_to_end() -> None:
    """A piezo reading 8 % low: the measured Au(111) steps give the factor back."""
    rng = np.random.default_rng(3)
    x, y = grid(200, 60e-9)
    s = x * math.cos(0.5) + y * math.sin(0.5)
    lev = np.floor(s / 15e-9 + 0.4)
    true_h = STEP_AU_M * lev + 5e-3 * x + 3e-12 * rng.standard_normal(x.shape)
    ds = frame(0.92 * true_h, 60e-9)
    lev_ds = level_terraces(ds)
    scale, su = z_scale_from_steps([lev_ds.attrs["step_height_m"]],
                                   [lev_ds.attrs["step_height_uncertainty_m"]],
                                   known_step_height_m=STEP_AU_M)
    assert scale == pytest.approx(1 / 0.92, rel=1e-3)
    out = scale_height(lev_ds, factor=scale, factor_uncertainty=su)
    assert out.attrs["step_height_m"] == pytest.approx(STEP_AU_M, rel=1e-3)


# --------------------------------------------------------------------------------------------
# lateral scale
# --------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("angle_deg", "skew_deg", "a_m"),
                         [(17.0, 1.0, NN_AU_M), (0.0, 1.0, NN_AU_M), (41.0, -1.0, NN_CU_M)])
def test_lattice_recovers_scale_and_skew(angle_deg: float, skew_deg: float, a_m: float) -> None:
    sx, sy = 1 / 1.03, 1.0  # image stretched 3 % along x
    ds = lattice_frame(sx=sx, sy=sy, skew_deg=skew_deg, angle_deg=angle_deg, a_m=a_m)
    cal = measure_lattice(ds, lattice_constant_m=a_m)
    print(f"\nlattice {angle_deg:.0f} deg: scale_x error {100 * (cal.scale_x / sx - 1):+.4f} %, "
          f"scale_y {100 * (cal.scale_y / sy - 1):+.4f} %, skew error "
          f"{cal.skew_deg - skew_deg:+.4f} deg, confidence {cal.confidence:.3f}")
    assert isinstance(cal, LatticeCalibration)
    assert cal.scale_x == pytest.approx(sx, rel=3e-3)  # brief: <= 0.3 %
    assert cal.scale_y == pytest.approx(sy, rel=3e-3)
    assert cal.skew_deg == pytest.approx(skew_deg, abs=0.1)  # brief: <= 0.1 deg
    assert 0.5 < cal.confidence <= 1
    # the stretched direction shows a longer apparent period than the true one
    assert cal.apparent_lattice_constants_m.max() > a_m * 1.005
    assert cal.angles_deg.sum() == pytest.approx(180.0)
    attrs = cal.as_attrs()
    assert attrs["lattice_scale_x"] == cal.scale_x


def test_scale_lateral_then_lattice_is_true() -> None:
    sx, sy = 1 / 1.03, 1 / 0.98
    ds = lattice_frame(sx=sx, sy=sy, skew_deg=0.0, angle_deg=23.0, a_m=NN_AU_M)
    cal = measure_lattice(ds, lattice_constant_m=NN_AU_M)
    before = ds.copy(deep=True)
    out = scale_lateral(ds, scale_x=cal.scale_x, scale_y=cal.scale_y)
    xr.testing.assert_identical(ds, before)
    np.testing.assert_allclose(out["x"].values, ds["x"].values * cal.scale_x)
    assert out.attrs["scan_size_x_m"] == pytest.approx(8e-9 * cal.scale_x)
    assert out.attrs["scan_center_y_m"] == pytest.approx(-3e-9 * cal.scale_y)
    assert out.attrs["lateral_scale_y"] == pytest.approx(cal.scale_y)
    assert get_history(out)[-1]["stage"] == "scale_lateral"
    # after the correction every direction shows the true period (crystal geometry)
    again = measure_lattice(out, lattice_constant_m=NN_AU_M)
    np.testing.assert_allclose(again.apparent_lattice_constants_m, NN_AU_M, rtol=2e-3)
    assert again.scale_x == pytest.approx(1.0, abs=1e-3)
    with pytest.raises(ProcessingError, match="scale_x = 0 must be a positive"):
        scale_lateral(ds, scale_x=0, scale_y=1.0)


def test_not_atomically_resolved_is_an_error() -> None:
    rng = np.random.default_rng(1)
    x, y = grid(256, 10e-9)
    terraces = STEP_AU_M * np.floor((x + 0.3 * y) / 3e-9) + 3e-12 * rng.standard_normal(x.shape)
    with pytest.raises(ProcessingError, match="frame cal: lattice calibration: not atomically "
                                              "resolved"):
        measure_lattice(frame(terraces, 10e-9), lattice_constant_m=NN_AU_M)
    # pixels too coarse for the period: 100 nm over 256 px cannot show a 0.29 nm lattice
    with pytest.raises(ProcessingError,
                       match=r"not atomically resolved: pixel spacing 3\.91e-10 m"):
        measure_lattice(frame(terraces, 100e-9), lattice_constant_m=NN_AU_M)
    with pytest.raises(ProcessingError, match="lattice_constant_m = 0 must be a positive"):
        measure_lattice(frame(terraces, 10e-9), lattice_constant_m=0)


def test_step_consensus_is_the_weighted_median_and_mad() -> None:
    from scipy import stats

    from pipeline.stages.calibrate import step_consensus, step_disagreement

    h = np.array([235.1, 235.6, 78.4, 235.3, 236.0]) * 1e-12
    # equal weights: the plain median and normal-scaled MAD (scipy.stats reference)
    m, s = step_consensus(h, np.full(5, 1e-12))
    assert m == np.median(h)
    assert s == pytest.approx(stats.median_abs_deviation(h, scale="normal"), rel=1e-9)
    # a precise frame pulls the weighted median to it: weights 1, 1, 1, 1, 100 (hand count)
    m, _ = step_consensus(h, np.array([1, 1, 1, 1, 0.1]) * 1e-12)
    assert m == 236.0e-12
    assert step_disagreement(78.4e-12, 0.3e-12, 235.3e-12, 0.3e-12, 5.0)[0]
    assert not step_disagreement(235.6e-12, 0.3e-12, 235.3e-12, 0.3e-12, 5.0)[0]
    with pytest.raises(ProcessingError, match="2 step heights and 1 uncertainties"):
        step_consensus([1e-10, 2e-10], [1e-12])
