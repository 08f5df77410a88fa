"""Approach-curve fitting, the run's work function, two-setpoint estimate and barrier maps.

Ground truth comes from the curve simulator (pipeline.simulate.curves); reference values name
their source beside the check.
"""

from __future__ import annotations

import inspect
import math

import numpy as np
import pytest
import xarray as xr

from pipeline import physics
from pipeline.config import BarrierConfig
from pipeline.errors import ProcessingError, ShapeError
from pipeline.model import get_history, make_raw_frame, validate_curves, validate_raw_frame
from pipeline.simulate.curves import grid_positions, simulate_approach_curves
from pipeline.stages.barrier import (
    FIT_CURVES_CONFIG_KEYS,
    WorkFunctionEstimate,
    apparent_barrier_map,
    combine_fit_tables,
    estimate_work_function,
    fit_approach_curve,
    fit_barrier_model,
    fit_curves,
    two_setpoint_work_function,
)


def _curves(seed: int = 0, **kw: object) -> tuple[xr.Dataset, dict]:
    return simulate_approach_curves(np.random.default_rng(seed), **kw)  # type: ignore[arg-type]


def _fit(ds: xr.Dataset, k: int = 0, **kw: object):
    return fit_approach_curve(ds["z"].values[k], ds["current"].values[k],
                              bias_V=float(ds.attrs["bias_V"]),
                              current_limit_A=ds.attrs.get("current_limit_A"), **kw)


# --------------------------------------------------------------------------------------------
# the simulator's curves
# --------------------------------------------------------------------------------------------


def test_simulated_curves_follow_the_curve_contract() -> None:
    ds, truth = _curves(1, n_curves=10, bias_V=-0.2, contact_fraction=0.2,
                        tip_change_fraction=0.2, positions=grid_positions(5, 2, 1e-9))
    checked = validate_curves(ds, source="sim")  # DESIGN §3 curve contract
    assert checked.sizes == {"curve": 10, "sample": 256}
    assert ds.attrs["bias_V"] == -0.2 and ds.attrs["current_limit_A"] == 1e-7
    assert np.asarray(ds.attrs["position_x_m"]).shape == (10,)
    cur = ds["current"].values
    # the sign follows the bias, clipped at the preamplifier limit
    assert np.median(cur[:, :60]) < 0 and np.all(np.abs(cur) <= 1e-7)
    assert np.any(cur == -1e-7)
    # far from the surface the current scatters around zero: samples of both signs (DESIGN §3)
    tail = cur[:, -40:]
    assert np.any(tail > 0) and np.any(tail < 0)
    assert abs(float(np.median(tail))) < 1e-12
    assert truth["contact"].sum() == 2 and truth["tip_change"].sum() == 2
    assert not np.any(truth["contact"] & truth["tip_change"])


# --------------------------------------------------------------------------------------------
# one curve
# --------------------------------------------------------------------------------------------


def test_noise_free_curve_gives_phi_exactly() -> None:
    # exact exponential law I ∝ exp(−2κz): φ_ap = φ (Binnig et al. 1982)
    ds, _ = _curves(0, n_curves=1, phi_eV=4.1, noise_fraction=0.0, noise_floor_A=0.0,
                    noise_correlation=0.0)
    f = _fit(ds)
    assert f.accepted and f.reason == ""
    assert f.phi_ap_eV == pytest.approx(4.1, abs=1e-6)
    assert f.decay_constant_per_m == pytest.approx(float(physics.decay_constant(4.1)), rel=1e-6)
    # saturated samples (above 100 nA) are outside the fit range
    z_sat = -math.log(100.0) / (2 * float(physics.decay_constant(4.1)))
    assert f.z_min_m > z_sat


def test_fit_range_excludes_noise_floor_and_saturation() -> None:
    ds, _ = _curves(2, n_curves=1, phi_eV=4.5)
    f = _fit(ds)
    kappa2 = 2 * float(physics.decay_constant(4.5))
    # fitted current at the ends: below 80 % of the limit, above 5 floor σ (3 pA)
    assert 1e-9 * math.exp(-kappa2 * f.z_min_m) <= 0.8e-7 * 1.01
    assert 1e-9 * math.exp(-kappa2 * f.z_max_m) >= 5 * 3e-12 * 0.8
    assert f.noise_floor_A == pytest.approx(3e-12, rel=0.3)  # simulator's floor
    assert f.relative_noise == pytest.approx(0.03, rel=0.35)  # simulator's relative noise
    assert f.usable.sum() == f.n_points


def test_fit_without_given_limit_detects_saturation_and_any_sample_order() -> None:
    ds, _ = _curves(3, n_curves=1)
    z, cur = ds["z"].values[0], ds["current"].values[0]
    given = fit_approach_curve(z, cur, bias_V=0.1, current_limit_A=1e-7)
    detected = fit_approach_curve(z, cur, bias_V=0.1)
    reversed_ = fit_approach_curve(z[::-1], cur[::-1], bias_V=0.1)
    assert detected.phi_ap_eV == pytest.approx(given.phi_ap_eV, abs=1e-9)
    assert reversed_.phi_ap_eV == pytest.approx(given.phi_ap_eV, abs=1e-9)
    np.testing.assert_array_equal(reversed_.usable[::-1], given.usable)


@pytest.mark.parametrize("phi", [3.0, 4.5, 6.0])
@pytest.mark.parametrize("bias", [0.01, 0.1, 1.0, -0.5])
def test_run_estimate_within_50_meV(phi: float, bias: float) -> None:
    # DESIGN §6 target: run estimate within 0.05 eV at 3 % noise, with a noise floor and
    # saturation; one curve of eight touches the surface, one changes its tip
    ds, truth = _curves(int(phi * 10 + bias * 100) % 997, n_curves=8, phi_eV=phi,
                        bias_V=bias, contact_fraction=0.125, tip_change_fraction=0.125)
    assert np.any(np.abs(ds["current"].values) >= 1e-7)  # saturation present
    table = fit_curves(ds)
    est = estimate_work_function(table)
    assert abs(est.work_function_eV - phi) < 0.05
    assert abs(est.work_function_eV - phi) < 4 * est.work_function_uncertainty_eV
    assert est.method == "approach-curves"
    named = dict(est.rejected)
    ids = [str(c) for c in table["curve_id"].values]
    for k in np.flatnonzero(truth["contact"]):
        assert named[ids[k]] == "contact"
    for k in np.flatnonzero(truth["tip_change"]):
        assert named[ids[k]] == "tip change"
    assert est.n_curves_used == 6


@pytest.mark.slow
@pytest.mark.parametrize("setting", [
    {"phi_eV": 4.5, "bias_V": 0.1},
    {"phi_eV": 3.2, "bias_V": -1.0, "noise_correlation": 0.6},
    {"phi_eV": 5.5, "bias_V": 0.05, "noise_correlation": 0.0, "current_offset_A": 4e-12},
])
def test_curve_uncertainty_is_honest(setting: dict) -> None:
    # TESTING.md: over ≥ 200 seeds the errors divided by the reported uncertainties have a
    # standard deviation near 1 (accepted: 0.8–1.25)
    norm = []
    for seed in range(200):
        ds, truth = _curves(seed, n_curves=1, n_samples=128, **setting)
        f = _fit(ds)
        assert f.accepted, f.reason
        norm.append((f.phi_ap_eV - truth["phi_eV"][0]) / f.phi_ap_uncertainty_eV)
    norm = np.asarray(norm)
    assert 0.8 <= norm.std() <= 1.25
    assert abs(norm.mean()) < 0.25  # no bias beyond 3.5 standard errors of the mean


@pytest.mark.slow
def test_run_uncertainty_is_honest() -> None:
    # the run estimate's uncertainty, over 200 simulated runs of four curves each
    norm = []
    for seed in range(200):
        ds, _ = _curves(1000 + seed, n_curves=4, n_samples=96, phi_eV=4.8, bias_V=0.2)
        est = estimate_work_function(fit_curves(ds))
        norm.append((est.work_function_eV - 4.8) / est.work_function_uncertainty_eV)
    assert 0.8 <= np.std(norm) <= 1.25


def test_tip_change_and_contact_are_rejected_by_name() -> None:
    ds, truth = _curves(5, n_curves=10, contact_fraction=0.3, tip_change_fraction=0.3)
    table = fit_curves(ds)
    reasons = table["reason"].values
    np.testing.assert_array_equal(reasons[truth["tip_change"]], "tip change")
    np.testing.assert_array_equal(reasons[truth["contact"]], "contact")
    clean = ~(truth["tip_change"] | truth["contact"])
    np.testing.assert_array_equal(table["accepted"].values, clean.astype(np.uint8))
    # contact: the fit range stops short of the plateau
    for k in np.flatnonzero(truth["contact"]):
        i_close = 1e-9 * math.exp(-2 * float(physics.decay_constant(4.5))
                                  * float(table["z_min_m"][k]))
        assert i_close < truth["contact_current_A"][k]


def test_contact_curve_kept_when_not_rejected() -> None:
    ds, truth = _curves(6, n_curves=4, contact_fraction=0.5)
    table = fit_curves(ds, reject_contact_curves=False)
    k = int(np.flatnonzero(truth["contact"])[0])
    assert table["accepted"].values[k] == 1
    assert float(table["phi_ap_eV"][k]) == pytest.approx(4.5, abs=0.1)


def _bad(kind: str) -> tuple[np.ndarray, np.ndarray, float]:
    ds, _ = _curves(7, n_curves=1)
    z, cur = ds["z"].values[0].copy(), ds["current"].values[0].copy()
    if kind == "short":
        return z[100:106], cur[100:106], 0.1
    if kind == "far":
        far, _ = _curves(7, n_curves=1, z_range_m=(0.6e-9, 1.2e-9))
        return far["z"].values[0], far["current"].values[0], 0.1
    if kind == "nan":
        return z, np.full_like(cur, np.nan), 0.1
    if kind == "rising":
        return -z, cur, 0.1
    if kind == "flat":
        rng = np.random.default_rng(1)
        return z, 1e-9 + 1e-12 * rng.standard_normal(z.size), 0.1
    if kind == "sign":
        return z, -cur, 0.1
    raise AssertionError(kind)


@pytest.mark.parametrize(("kind", "reason"), [
    ("short", "too few points"),
    ("far", "below noise floor"),
    ("nan", "no finite samples"),
    ("rising", "current increases on retract"),
    ("flat", "current does not decay on retract"),
    ("sign", "current sign contradicts the bias"),
])
def test_bad_curves_are_rejected_with_a_reason(kind: str, reason: str) -> None:
    z, cur, bias = _bad(kind)
    f = fit_approach_curve(z, cur, bias_V=bias, min_points=8)
    assert not f.accepted
    assert f.reason == reason


def test_scattered_nan_samples_are_skipped() -> None:
    ds, _ = _curves(8, n_curves=1)
    z, cur = ds["z"].values[0], ds["current"].values[0].copy()
    full = fit_approach_curve(z, cur, bias_V=0.1)
    cur[::9] = np.nan
    holed = fit_approach_curve(z, cur, bias_V=0.1)
    assert holed.accepted
    assert holed.phi_ap_eV == pytest.approx(full.phi_ap_eV, abs=3 * full.phi_ap_uncertainty_eV)
    assert not np.any(holed.usable[::9])


def test_fit_approach_curve_rejects_misuse_clearly() -> None:
    with pytest.raises(ShapeError, match=r"z \(5,\) and current \(4,\) must be 1-D"):
        fit_approach_curve(np.zeros(5), np.zeros(4), bias_V=0.1)
    with pytest.raises(ProcessingError, match=r"bias_V = 0\.0; a tunnelling curve needs"):
        fit_approach_curve(np.zeros(5), np.zeros(5), bias_V=0.0)
    with pytest.raises(ProcessingError, match="min_points = 2; at least 4"):
        fit_approach_curve(np.zeros(5), np.zeros(5), bias_V=0.1, min_points=2)


# --------------------------------------------------------------------------------------------
# the table
# --------------------------------------------------------------------------------------------


def test_fit_curves_leaves_input_unchanged_and_records_history() -> None:
    ds, _ = _curves(9, n_curves=3)
    before = ds.copy(deep=True)
    table = fit_curves(ds, min_points=10)
    xr.testing.assert_identical(ds, before)
    assert get_history(table)[-1]["stage"] == "fit_curves"
    assert get_history(table)[-1]["params"]["min_points"] == 10
    assert table.sizes == {"curve": 3}
    assert table["accepted"].dtype == np.uint8 and table["n_points"].dtype == np.int32
    assert table["phi_ap_eV"].attrs["units"] == "eV"
    assert [str(c) for c in table["curve_id"].values] == ["curves#0", "curves#1", "curves#2"]


def test_fit_table_round_trips_through_netcdf(tmp_path) -> None:
    ds, _ = _curves(10, n_curves=4, contact_fraction=0.25, positions=grid_positions(2, 2, 1e-9))
    ds.attrs["source_file"] = "c01.nc"
    table = fit_curves(ds, bias_correction=True)
    path = tmp_path / "table.nc"
    table.to_netcdf(path, engine="h5netcdf")
    with xr.open_dataset(path, engine="h5netcdf") as back:
        xr.testing.assert_identical(back.load(), table)
    assert set(table["reason"].values) == {"", "contact"}


def test_combined_tables_feed_one_estimate() -> None:
    tables = []
    for k in range(3):
        ds, _ = _curves(20 + k, n_curves=4, phi_eV=4.0, curve_set_id=f"set{k}")
        tables.append(fit_curves(ds))
    run = combine_fit_tables(tables)
    assert run.sizes["curve"] == 12 and str(run["curve_id"].values[5]) == "set1#1"
    assert estimate_work_function(run).work_function_eV == pytest.approx(4.0, abs=0.03)
    with pytest.raises(ProcessingError, match="no tables"):
        combine_fit_tables([])


def test_config_keys_are_fit_curves_arguments() -> None:
    cfg = BarrierConfig()
    params = inspect.signature(fit_curves).parameters
    assert set(FIT_CURVES_CONFIG_KEYS) <= set(BarrierConfig.model_fields)
    assert set(FIT_CURVES_CONFIG_KEYS) <= set(params)
    ds, _ = _curves(11, n_curves=2)
    table = fit_curves(ds, **cfg.model_dump(include=set(FIT_CURVES_CONFIG_KEYS)))
    assert table["accepted"].values.tolist() == [1, 1]


# --------------------------------------------------------------------------------------------
# the run's estimate
# --------------------------------------------------------------------------------------------


def _table_of(phi: list[float], sigma: list[float]) -> xr.Dataset:
    n = len(phi)
    return xr.Dataset({
        "phi_ap_eV": ("curve", np.asarray(phi, float)),
        "phi_ap_uncertainty_eV": ("curve", np.asarray(sigma, float)),
        "accepted": ("curve", np.ones(n, np.uint8)),
        "reason": ("curve", np.array([""] * n)),
        "curve_id": ("curve", np.array([f"c#{k}" for k in range(n)])),
    })


def test_weighted_mean_of_agreeing_curves() -> None:
    # inverse-variance weighted mean and its standard error (Birge 1932): values agree within
    # their errors, so τ = 0 and the error is 1/√Σw
    phi, sig = [4.50, 4.52, 4.49, 4.51], [0.02, 0.02, 0.01, 0.02]
    est = estimate_work_function(_table_of(phi, sig))
    w = 1 / np.square(sig)
    assert est.work_function_eV == pytest.approx(float(np.sum(w * phi) / np.sum(w)))
    assert est.work_function_uncertainty_eV == pytest.approx(float(1 / np.sqrt(np.sum(w))))
    assert est.scatter_eV == 0 and est.birge_ratio < 1


def test_outlier_is_rejected_by_name_and_table_updated() -> None:
    table = _table_of([4.50, 4.52, 4.49, 4.51, 4.95, 4.50], [0.02] * 6)
    est = estimate_work_function(table, outlier_threshold_sigma=3.0)
    assert [cid for cid, _ in est.rejected] == ["c#4"]
    assert est.rejected[0][1].startswith("outlier: +")
    assert est.n_curves_used == 5
    assert est.work_function_eV == pytest.approx(4.504, abs=1e-3)
    updated = est.updated_table(table)
    assert updated["accepted"].values.tolist() == [1, 1, 1, 1, 0, 1]
    assert str(updated["reason"].values[4]).startswith("outlier")
    assert table["accepted"].values.tolist() == [1] * 6  # the input is unchanged


def test_scatter_between_curves_widens_the_uncertainty() -> None:
    # curves that differ beyond their fit errors (τ = 0.1 eV between tips/sites): the estimate's
    # error must reflect the scatter, ≈ τ/√n (DerSimonian & Laird 1986), not the fit errors
    rng = np.random.default_rng(3)
    phi = 4.5 + 0.1 * rng.standard_normal(30)
    est = estimate_work_function(_table_of(list(phi), [0.01] * 30))
    assert est.scatter_eV == pytest.approx(0.1, rel=0.35)
    assert est.work_function_uncertainty_eV == pytest.approx(np.std(phi) / math.sqrt(30),
                                                             rel=0.3)
    assert est.birge_ratio > 5


def test_no_usable_curve_is_a_clear_error_and_fixed_is_the_fallback() -> None:
    ds, _ = _curves(12, n_curves=2, z_range_m=(0.6e-9, 1.2e-9))
    table = fit_curves(ds)
    with pytest.raises(ProcessingError, match=r"none of 2 curve\(s\) is usable \(below noise"):
        estimate_work_function(table)
    fixed = WorkFunctionEstimate.fixed(4.5, 0.5, note="no usable approach curves")
    assert fixed.method == "fixed"
    attrs = fixed.to_attrs()
    assert attrs["work_function_eV"] == 4.5 and attrs["barrier_method"] == "fixed"


# --------------------------------------------------------------------------------------------
# bias correction with the WKB model
# --------------------------------------------------------------------------------------------


def test_wkb_bias_correction_goes_the_right_way() -> None:
    # Simmons 1963: at 1 V the trapezoid's mean height is lowered, so φ_ap < φ; the model fit
    # must correct upwards and recover the true φ
    ds, truth = _curves(13, n_curves=2, model="wkb", bias_V=1.0, phi_eV=4.5)
    f = _fit(ds)
    assert f.phi_ap_eV < 4.5 - 0.05
    assert f.phi_ap_eV == pytest.approx(truth["phi_ap_eV"][0], abs=3 * f.phi_ap_uncertainty_eV)
    m = fit_barrier_model(ds["z"].values[0], ds["current"].values[0], bias_V=1.0, fit=f)
    assert m.correction_eV > 0.05
    assert m.phi_eV == pytest.approx(4.5, abs=3 * m.phi_uncertainty_eV + 0.005)
    # low bias: no correction (the model reduces to the exponential law)
    ds_low, _ = _curves(13, n_curves=1, model="wkb", bias_V=0.01, phi_eV=4.5)
    m_low = fit_barrier_model(ds_low["z"].values[0], ds_low["current"].values[0], bias_V=0.01,
                              current_limit_A=1e-7)
    assert abs(m_low.correction_eV) < 0.005


def test_image_force_model_is_recovered_and_reported() -> None:
    ds, _ = _curves(14, n_curves=3, model="wkb", profile="image-force", bias_V=0.1)
    table = fit_curves(ds, bias_correction=True, barrier_profile="image-force")
    est = estimate_work_function(table)
    assert est.work_function_eV < 4.0  # image force lowers φ_ap strongly (Simmons 1963 §V)
    assert est.model_work_function_eV == pytest.approx(4.5, abs=0.05)
    assert est.to_attrs()["work_function_model_eV"] == est.model_work_function_eV
    assert table.attrs["barrier_profile"] == "image-force"


# --------------------------------------------------------------------------------------------
# two setpoints, maps
# --------------------------------------------------------------------------------------------


def _cc_frame(z: np.ndarray, setpoint: float, bias: float = 0.1, frame_id: str = "f") -> xr.Dataset:
    attrs = {"mode": "constant-current", "bias_V": bias, "setpoint_A": setpoint,
             "scan_size_x_m": 20e-9, "scan_size_y_m": 20e-9, "line_time_s": 0.1,
             "start_time": "2026-03-14T23:00:00", "frame_id": frame_id}
    return validate_raw_frame(make_raw_frame(z=z, attrs=attrs), source=frame_id)


def test_two_setpoint_work_function() -> None:
    # constant current: Δz = −ln(I₂/I₁)/(2κ) between two frames of one area (Binnig 1982)
    rng = np.random.default_rng(4)
    x = np.mgrid[0:64, 0:64][1]
    surface = 50e-12 * np.sin(2 * np.pi * x / 16) + 100e-12 * (x > 30)
    dz = -math.log(10.0) / (2 * float(physics.decay_constant(4.7)))
    za = surface + 2e-12 * rng.standard_normal(surface.shape)
    zb = surface + dz + 2e-12 * rng.standard_normal(surface.shape)
    est = two_setpoint_work_function(_cc_frame(za, 1e-10, frame_id="a"),
                                     _cc_frame(zb, 1e-9, frame_id="b"))
    assert est.method == "two-setpoint"
    assert est.work_function_eV == pytest.approx(4.7, abs=max(4 * est.work_function_uncertainty_eV,
                                                              0.002))
    assert 0 < est.work_function_uncertainty_eV < 0.02
    with pytest.raises(ProcessingError, match="tip must approach at the larger setpoint"):
        two_setpoint_work_function(_cc_frame(zb, 1e-10, frame_id="a"),
                                   _cc_frame(za, 1e-9, frame_id="b"))
    with pytest.raises(ProcessingError, match="differ by more than 10 %"):
        two_setpoint_work_function(_cc_frame(za, 1e-9), _cc_frame(zb, 1.02e-9))
    with pytest.raises(ProcessingError, match="must share one bias"):
        two_setpoint_work_function(_cc_frame(za, 1e-10, 0.1), _cc_frame(zb, 1e-9, 0.5))


def test_barrier_map_from_a_grid_of_curves() -> None:
    ds, truth = _curves(15, n_curves=12, positions=grid_positions(4, 3, 2e-9),
                        tip_change_fraction=1 / 12)
    before = ds.copy(deep=True)
    out = apparent_barrier_map(ds)
    xr.testing.assert_identical(ds, before)
    assert out["phi_ap_eV"].dims == ("y", "x") and out["phi_ap_eV"].shape == (3, 4)
    np.testing.assert_allclose(out["x"].values, [-3e-9, -1e-9, 1e-9, 3e-9])
    k = int(np.flatnonzero(truth["tip_change"])[0])
    iy, ix = divmod(k, 4)
    assert np.isnan(out["phi_ap_eV"].values[iy, ix]) and out["accepted"].values[iy, ix] == 0
    good = out["accepted"].values.astype(bool)
    assert np.all(np.abs(out["phi_ap_eV"].values[good] - 4.5) < 4 * out[
        "phi_ap_uncertainty_eV"].values[good])
    assert get_history(out)[-1]["stage"] == "apparent_barrier_map"


def test_barrier_map_from_a_dlnI_dz_channel() -> None:
    # φ_ap = 0.9525 eV·Å² × (d ln I/dz)² per pixel (Binnig 1982); uncertainty from the noise
    rng = np.random.default_rng(5)
    x = np.mgrid[0:48, 0:64][1]
    phi_true = 4.0 + 1.0 * x / 63
    slope = -2 * physics.decay_constant(phi_true)
    noisy = slope * (1 + 0.01 * rng.standard_normal(slope.shape))
    frame = make_raw_frame(current=np.full(slope.shape, 1e-9), attrs={
        "mode": "constant-height", "bias_V": 0.1, "scan_size_x_m": 10e-9,
        "scan_size_y_m": 8e-9, "line_time_s": 0.1, "start_time": "2026-03-14T23:00:00"})
    frame["dlnI_dz_per_m"] = (("y", "x"), noisy)
    out = apparent_barrier_map(frame)
    err = out["phi_ap_eV"].values - phi_true
    assert abs(float(np.mean(err))) < 0.01
    ratio = float(np.std(err / out["phi_ap_uncertainty_eV"].values))
    assert 0.8 < ratio < 1.25
    assert out["phi_ap_eV"].dtype == np.float32
    frame2 = frame.drop_vars("dlnI_dz_per_m")
    with pytest.raises(ProcessingError, match="has no 'dlnI_dz_per_m' channel"):
        apparent_barrier_map(frame2)
