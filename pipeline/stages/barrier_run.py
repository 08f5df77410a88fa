"""The run's barrier height (private: import from pipeline.stages.barrier).

:func:`estimate_work_function` combines a run's table of curve fits into one value with outlier
rejection by name; :func:`two_setpoint_work_function` is the estimate for runs without curves;
:class:`WorkFunctionEstimate` carries either (or a configured fixed value) with its provenance.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from pipeline import physics
from pipeline.errors import ProcessingError
from pipeline.stages.barrier_noise import _mad_sigma

__all__ = ["WorkFunctionEstimate", "estimate_work_function", "two_setpoint_work_function"]


@dataclass(frozen=True)
class WorkFunctionEstimate:
    """The barrier height a run's height conversion uses, with its provenance.

    Attributes
    ----------
    work_function_eV, work_function_uncertainty_eV : float
        φ in 2κ = 1.0246 Å⁻¹·√(φ/eV) at the run's bias (the apparent barrier height), and its
        standard uncertainty, eV.
    method : str
        ``"approach-curves"``, ``"fixed"`` or ``"two-setpoint"``.
    n_curves_used : int
        Curves in the estimate.
    rejected : list of (str, str)
        (curve id, reason) of every curve left out, by the fit or as an outlier.
    birge_ratio : float
        √(χ²/(k − 1)) of the accepted curves about their weighted mean (≈ 1 when the curves
        agree within their uncertainties; NaN for fewer than two curves).
    scatter_eV : float
        Between-curve standard deviation τ beyond the fit uncertainties (DerSimonian–Laird).
    model_work_function_eV, model_work_function_uncertainty_eV : float or None
        Bias-corrected barrier from the WKB model (when the table has ``phi_model_eV``).
    note : str
        Why a fixed value was used, or other remarks.
    """

    work_function_eV: float
    work_function_uncertainty_eV: float
    method: str
    n_curves_used: int = 0
    rejected: list[tuple[str, str]] = field(default_factory=list)
    birge_ratio: float = math.nan
    scatter_eV: float = 0.0
    model_work_function_eV: float | None = None
    model_work_function_uncertainty_eV: float | None = None
    note: str = ""

    @classmethod
    def fixed(cls, work_function_eV: float, work_function_uncertainty_eV: float, *,
              note: str = "", rejected: Sequence[tuple[str, str]] = ()) -> WorkFunctionEstimate:
        """A configured value (``[barrier] source = "fixed"``, or a run without usable curves)."""
        return cls(float(work_function_eV), float(work_function_uncertainty_eV), "fixed",
                   rejected=list(rejected), note=note)

    def updated_table(self, table: xr.Dataset) -> xr.Dataset:
        """A copy of ``table`` with ``accepted``/``reason`` updated for the outlier rejections."""
        out = table.copy(deep=True)
        ids = [str(c) for c in out["curve_id"].values]
        accepted = out["accepted"].values.copy()
        reason = out["reason"].values.astype(object)
        for cid, why in self.rejected:
            if cid in ids:
                k = ids.index(cid)
                accepted[k] = 0
                reason[k] = why
        out["accepted"] = (("curve",), accepted.astype(np.uint8), dict(out["accepted"].attrs))
        out["reason"] = (("curve",), np.array(reason.tolist(), dtype=str),
                         dict(out["reason"].attrs))
        return out

    def to_attrs(self) -> dict[str, Any]:
        """Attributes of the store's ``run`` group (DESIGN.md §4)."""
        attrs: dict[str, Any] = {
            "work_function_eV": self.work_function_eV,
            "work_function_uncertainty_eV": self.work_function_uncertainty_eV,
            "barrier_method": self.method,
            "barrier_curves_used": self.n_curves_used,
            "barrier_curves_rejected": len(self.rejected),
        }
        if math.isfinite(self.birge_ratio):
            attrs["barrier_birge_ratio"] = self.birge_ratio
        attrs["barrier_scatter_eV"] = self.scatter_eV
        if self.model_work_function_eV is not None:
            attrs["work_function_model_eV"] = self.model_work_function_eV
            attrs["work_function_model_uncertainty_eV"] = self.model_work_function_uncertainty_eV
        if self.note:
            attrs["barrier_note"] = self.note
        return attrs


def _dl_tau2(phi: np.ndarray, var: np.ndarray) -> float:
    """DerSimonian–Laird between-study variance τ² (0 when the scatter is within errors)."""
    k = phi.size
    if k < 2:
        return 0.0
    w = 1.0 / var
    mu = np.sum(w * phi) / np.sum(w)
    q = float(np.sum(w * (phi - mu) ** 2))
    denom = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    return max(0.0, (q - (k - 1)) / denom) if denom > 0 else 0.0


def _random_effects(phi: np.ndarray, var: np.ndarray) -> tuple[float, float, float, float]:
    """(mean, standard error, τ, Birge ratio) of a random-effects weighted mean.

    The standard error uses the Knapp–Hartung factor max(1, √(Q*/(k − 1))), so a scatter that
    τ does not fully capture still widens it.
    """
    k = phi.size
    tau2 = _dl_tau2(phi, var)
    w = 1.0 / (var + tau2)
    mu = float(np.sum(w * phi) / np.sum(w))
    se = math.sqrt(1.0 / float(np.sum(w)))
    if k >= 2:
        q_star = float(np.sum(w * (phi - mu) ** 2))
        se *= max(1.0, math.sqrt(q_star / (k - 1)))
        w0 = 1.0 / var
        mu0 = np.sum(w0 * phi) / np.sum(w0)
        birge = math.sqrt(float(np.sum(w0 * (phi - mu0) ** 2)) / (k - 1))
    else:
        birge = math.nan
    return mu, se, math.sqrt(tau2), birge


def _leave_one_out_z(phi: np.ndarray, var: np.ndarray) -> np.ndarray:
    """Deviation of each curve from the random-effects mean of all the others, in σ.

    σ combines the curve's own variance, the others' τ² and the uncertainty of their mean,
    so a single outlier cannot hide by inflating the scatter it is judged against.
    """
    k = phi.size
    w = 1.0 / var
    sw, swp, swp2, sw2 = w.sum(), (w * phi).sum(), (w * phi**2).sum(), (w**2).sum()
    s_i, sp_i, sp2_i, s2_i = sw - w, swp - w * phi, swp2 - w * phi**2, sw2 - w**2
    q_i = sp2_i - sp_i**2 / s_i
    denom = s_i - s2_i / s_i
    with np.errstate(divide="ignore", invalid="ignore"):
        tau2_i = np.where(denom > 0, np.maximum(0.0, (q_i - (k - 2)) / denom), 0.0)
    others = ~np.eye(k, dtype=bool)
    w_star = np.where(others, 1.0 / (var[None, :] + tau2_i[:, None]), 0.0)  # (i, j)
    mu_i = (w_star * phi[None, :]).sum(axis=1) / w_star.sum(axis=1)
    var_mu_i = 1.0 / w_star.sum(axis=1)
    return (phi - mu_i) / np.sqrt(var + tau2_i + var_mu_i)


def estimate_work_function(
    table: xr.Dataset,
    *,
    outlier_threshold_sigma: float = 3.0,
) -> WorkFunctionEstimate:
    """Combine a run's curve fits into one barrier height, rejecting outliers by name.

    Parameters
    ----------
    table : xarray.Dataset
        A fit table (:func:`fit_curves`, or several combined with :func:`combine_fit_tables`).
    outlier_threshold_sigma : float
        A curve deviating from the mean of the others by more than this many σ is rejected;
        repeated, worst first, while at least three curves remain.

    Returns
    -------
    WorkFunctionEstimate
        ``method = "approach-curves"``; ``rejected`` names every left-out curve and why.

    Raises
    ------
    ProcessingError
        If no curve is usable (the caller then falls back to the configured fixed value,
        :meth:`WorkFunctionEstimate.fixed`, listing the reasons).

    Notes
    -----
    Outliers: each curve is compared with the random-effects mean of all the others
    (leave-one-out, vectorised), with σ² = σᵢ² + τ² + var(mean); the worst beyond the threshold
    is rejected and the test repeated. Estimate: random-effects weighted mean with weights
    1/(σᵢ² + τ²), τ² by DerSimonian–Laird; its standard error carries the Knapp–Hartung factor,
    so it is honest both when the curves agree within their fit uncertainties (τ = 0, Birge
    ratio ≈ 1) and when tips or sites genuinely differ (τ > 0).

    References
    ----------
    R. T. Birge, Phys. Rev. 40, 207 (1932), doi:10.1103/PhysRev.40.207;
    R. DerSimonian and N. Laird, Control. Clin. Trials 7, 177 (1986),
    doi:10.1016/0197-2456(86)90046-2; G. Knapp and J. Hartung, Stat. Med. 22, 2693 (2003),
    doi:10.1002/sim.1482.
    """
    ids = [str(c) for c in table["curve_id"].values]
    phi_all = np.asarray(table["phi_ap_eV"].values, dtype=float)
    sig_all = np.asarray(table["phi_ap_uncertainty_eV"].values, dtype=float)
    reasons = [str(r) for r in table["reason"].values]
    ok = (np.asarray(table["accepted"].values).astype(bool) & np.isfinite(phi_all)
          & np.isfinite(sig_all) & (sig_all > 0))
    rejected = [(ids[k], reasons[k] or "no valid fit") for k in np.flatnonzero(~ok)]
    if not ok.any():
        summary = ", ".join(sorted({r for _, r in rejected})) or "no curves"
        raise ProcessingError(
            f"estimate_work_function: none of {len(ids)} curve(s) is usable ({summary})")
    kept = np.flatnonzero(ok)
    while kept.size >= 3:
        zs = _leave_one_out_z(phi_all[kept], sig_all[kept] ** 2)
        worst = int(np.argmax(np.abs(zs)))
        if abs(zs[worst]) <= outlier_threshold_sigma:
            break
        k = int(kept[worst])
        rejected.append((ids[k], f"outlier: {zs[worst]:+.1f} sigma from the other curves' mean"))
        kept = np.delete(kept, worst)
    mu, se, tau, birge = _random_effects(phi_all[kept], sig_all[kept] ** 2)
    model_mu = model_se = None
    if "phi_model_eV" in table:
        pm = np.asarray(table["phi_model_eV"].values, dtype=float)[kept]
        sm = np.asarray(table["phi_model_uncertainty_eV"].values, dtype=float)[kept]
        good = np.isfinite(pm) & np.isfinite(sm) & (sm > 0)
        if good.any():
            model_mu, model_se, _, _ = _random_effects(pm[good], sm[good] ** 2)
    return WorkFunctionEstimate(
        work_function_eV=mu, work_function_uncertainty_eV=se, method="approach-curves",
        n_curves_used=int(kept.size), rejected=rejected, birge_ratio=birge, scatter_eV=tau,
        model_work_function_eV=model_mu, model_work_function_uncertainty_eV=model_se)


# --------------------------------------------------------------------------------------------
# two setpoints
# --------------------------------------------------------------------------------------------


def _frame_name(ds: xr.Dataset) -> str:
    return str(ds.attrs.get("frame_id") or ds.attrs.get("source_file") or "<frame>")


def two_setpoint_work_function(frame_a: xr.Dataset, frame_b: xr.Dataset) -> WorkFunctionEstimate:
    """Barrier height from two constant-current frames of one area at different setpoints.

    Parameters
    ----------
    frame_a, frame_b : xarray.Dataset
        Validated raw constant-current frames (``z`` in m) of the same area, shape and bias,
        recorded one after the other at setpoints I₁ and I₂.

    Returns
    -------
    WorkFunctionEstimate
        ``method = "two-setpoint"``.

    Raises
    ------
    ProcessingError
        If the frames are not constant-current, differ in bias, shape or area, have (nearly)
        equal setpoints, or the tip did not approach at the larger setpoint.

    Notes
    -----
    The feedback holds I = I_set, so the tip height changes by Δz = z₂ − z₁ = −ln(I₂/I₁)/(2κ)
    between the frames, whatever the surface: 2κ = −ln(I₂/I₁)/Δz and φ = (2κ/1.0246 Å⁻¹)² eV.
    Δz is the median of the per-line medians of z₂ − z₁ (robust to adsorbates and line
    glitches); its standard error is taken from the spread of those line medians, which also
    absorbs slow z drift during the frames. z creep between the two frames biases Δz directly:
    record them back to back.

    References
    ----------
    G. Binnig, H. Rohrer, Ch. Gerber and E. Weibel, Phys. Rev. Lett. 49, 57 (1982),
    doi:10.1103/PhysRevLett.49.57; C. J. Chen, *Introduction to Scanning Tunneling
    Microscopy*, 2nd ed. (Oxford, 2008), §1.
    """
    na, nb = _frame_name(frame_a), _frame_name(frame_b)
    for ds, name in ((frame_a, na), (frame_b, nb)):
        if ds.attrs.get("mode") != "constant-current" or "z" not in ds:
            raise ProcessingError(f"two-setpoint: frame {name} is not a constant-current frame "
                                  "with a 'z' channel")
        if str(ds["z"].attrs.get("units", "m")) != "m":
            raise ProcessingError(f"two-setpoint: frame {name}: z must be in m (validate it)")
    va, vb = float(frame_a.attrs["bias_V"]), float(frame_b.attrs["bias_V"])
    if not math.isclose(va, vb, rel_tol=0.01):
        raise ProcessingError(f"two-setpoint: frames {na} ({va:g} V) and {nb} ({vb:g} V) must "
                              "share one bias")
    ia, ib = float(frame_a.attrs["setpoint_A"]), float(frame_b.attrs["setpoint_A"])
    if ia * ib <= 0 or abs(math.log(ib / ia)) < 0.1:
        raise ProcessingError(
            f"two-setpoint: setpoints {ia:.3g} A ({na}) and {ib:.3g} A ({nb}) must have one sign "
            "and differ by more than 10 %")
    if frame_a["z"].shape != frame_b["z"].shape:
        raise ProcessingError(f"two-setpoint: frames {na} {frame_a['z'].shape} and {nb} "
                              f"{frame_b['z'].shape} must have the same shape")
    for key in ("scan_size_x_m", "scan_size_y_m", "scan_center_x_m", "scan_center_y_m"):
        a, b = float(frame_a.attrs.get(key, 0.0)), float(frame_b.attrs.get(key, 0.0))
        size = float(frame_a.attrs["scan_size_x_m"])
        if abs(a - b) > 0.01 * size:
            raise ProcessingError(f"two-setpoint: frames {na} and {nb} differ in {key} "
                                  f"({a:.4g} vs {b:.4g} m): not the same area")
    dz = np.asarray(frame_b["z"].values, float) - np.asarray(frame_a["z"].values, float)
    with np.errstate(all="ignore"):
        rows = np.nanmedian(np.where(np.isfinite(dz), dz, np.nan), axis=1)
    rows = rows[np.isfinite(rows)]
    if rows.size < 2:
        raise ProcessingError(f"two-setpoint: frames {na} and {nb} share fewer than 2 lines")
    delta = float(np.median(rows))
    se = math.sqrt(math.pi / 2.0) * _mad_sigma(rows) / math.sqrt(rows.size)
    two_kappa = -math.log(ib / ia) / delta if delta != 0 else -math.inf
    if not two_kappa > 0:
        raise ProcessingError(
            f"two-setpoint: z changed by {delta * 1e12:+.1f} pm from {na} to {nb} while the "
            f"setpoint went from {ia:.3g} to {ib:.3g} A; the tip must approach at the larger "
            "setpoint")
    phi = float(physics.work_function_from_decay(two_kappa / 2.0))
    sigma = 2.0 * phi * se / abs(delta)
    return WorkFunctionEstimate(phi, sigma, "two-setpoint",
                                note=f"frames {na} and {nb}: dz = {delta * 1e12:.2f} pm")
