"""The two traces aligned and combined, and the height stage itself."""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from pipeline import physics
from pipeline.errors import ProcessingError
from pipeline.model import BAD_PIXELS, Flag, add_warning, make_height_frame, stage
from pipeline.stages.height.conversion import (
    _SATURATION_FRACTION,
    _check_current,
    _constant_current_trace,
    _constant_height_trace,
    _CurrentCheck,
    _Trace,
)
from pipeline.stages.height.traces import (
    _bracket,
    _shift_linear,
    _shift_rows,
    _take_columns,
    estimate_trace_lag,
)

#: Largest believable lag between the traces, as a fraction of the line length.
_MAX_LAG_FRACTION = 0.25


def _shift_trace(t: _Trace, shift_px: float) -> _Trace:
    if shift_px == 0:
        return t
    lo, hi = _bracket(t.height.shape[1], shift_px)
    flags = _take_columns(t.flags, lo) | _take_columns(t.flags, hi)
    bad = (flags & np.uint8(BAD_PIXELS)) != 0
    h, p = _shift_rows([t.height, t.phi_part], shift_px)
    sig = _shift_linear(np.where(np.isfinite(t.sigma), t.sigma, 0.0), shift_px)
    h[bad] = np.nan
    p[bad] = np.nan
    sig[bad] = np.nan
    return _Trace(h, sig, p, flags)


def _combine(fw: _Trace, bw: _Trace, *, lag_px: float, mismatch_sigma: float
             ) -> tuple[_Trace, int]:
    """Align both traces by half the lag each, average where they agree."""
    u = 0.0 if not math.isfinite(lag_px) else 0.5 * lag_px
    f, b = _shift_trace(fw, u), _shift_trace(bw, -u)
    fg, bg = np.isfinite(f.height), np.isfinite(b.height)
    if fg.all() and bg.all():  # every pixel in both traces: the same result, fewer passes
        diff = f.height - b.height
        sd = np.sqrt(f.sigma * f.sigma + b.sigma * b.sigma)
        mism = np.abs(diff) > mismatch_sigma * sd
        if mism.any():
            h = np.where(mism, f.height, 0.5 * (f.height + b.height))
            p = np.where(mism, f.phi_part, 0.5 * (f.phi_part + b.phi_part))
            sig = np.where(mism, f.sigma, 0.5 * sd)
        else:
            h, p, sig = 0.5 * (f.height + b.height), 0.5 * (f.phi_part + b.phi_part), 0.5 * sd
        flags = np.zeros(h.shape, np.uint8)
        flags[mism] |= np.uint8(Flag.TRACE_MISMATCH)
        return _Trace(h, sig, p, flags), int(mism.sum())
    both = fg & bg
    diff = np.where(both, f.height - b.height, 0.0)
    fs, bs = np.where(both, f.sigma, 0.0), np.where(both, b.sigma, 0.0)
    sd = np.sqrt(fs * fs + bs * bs)  # hypot(fs, bs) to within an ulp, several times faster
    mism = both & (np.abs(diff) > mismatch_sigma * sd)
    agree = both & ~mism
    h = np.where(agree, 0.5 * (f.height + b.height), np.where(fg, f.height, b.height))
    p = np.where(agree, 0.5 * (f.phi_part + b.phi_part), np.where(fg, f.phi_part, b.phi_part))
    sig = np.where(agree, 0.5 * sd, np.where(fg, f.sigma, b.sigma))
    flags = np.where(fg | bg, 0, f.flags | b.flags).astype(np.uint8)
    flags[mism] |= np.uint8(Flag.TRACE_MISMATCH)
    return _Trace(h, sig, p, flags), int(mism.sum())


def _check_units(raw: xr.Dataset, frame: str) -> None:
    for name, unit in (("z", "m"), ("z_backward", "m"), ("current", "A"),
                       ("current_backward", "A")):
        if name in raw.data_vars and str(raw[name].attrs.get("units", unit)) != unit:
            raise ProcessingError(
                f"frame {frame}: variable '{name}' is in {raw[name].attrs.get('units')!r}, "
                f"expected '{unit}' (pass the frame through model.validate_raw_frame first)")


def _polarity(bias_V: float, current: np.ndarray | None) -> float:
    if bias_V != 0:
        return math.copysign(1.0, bias_V)
    if current is not None:
        vals = current[np.isfinite(current)]
        if vals.size and np.median(vals) < 0:
            return -1.0
    return 1.0


def _opt_limit(raw: xr.Dataset) -> float | None:
    lim = raw.attrs.get("current_limit_A")
    if lim is None:
        return None
    val = float(np.asarray(lim).item())
    return val if math.isfinite(val) and val > 0 else None


@stage(version="1")
def reconstruct_height(
    raw: xr.Dataset,
    *,
    work_function_eV: float,
    work_function_uncertainty_eV: float = 0.0,
    combine_traces: bool = True,
    trace_mismatch_sigma: float = 5.0,
    noise_floor_A: float | None = None,
    current_noise_A: float | None = None,
) -> xr.Dataset:
    """Turn a validated raw frame into a height map with uncertainty and quality flags.

    Parameters
    ----------
    raw : xarray.Dataset
        Output of :func:`pipeline.model.validate_raw_frame` (z in m, currents in A).
    work_function_eV : float
        Barrier height φ of the decay law, eV (2κ = 1.0246 Å⁻¹·√(φ/eV)).
    work_function_uncertainty_eV : float
        Standard uncertainty of φ, eV; added to ``height_uncertainty`` as ``|∂h/∂φ|·σ_φ``.
    combine_traces : bool
        Align and average forward and backward traces where both exist. When false, the
        forward trace alone is converted (the lag is still measured and reported).
    trace_mismatch_sigma : float
        Pixels whose aligned traces differ by more than this many combined noise standard
        deviations are flagged ``TRACE_MISMATCH`` and take the forward trace's value.
    noise_floor_A : float, optional
        Current magnitude below which a pixel carries no usable height (default: three times
        the additive current noise measured on the frame).
    current_noise_A : float, optional
        Standard deviation of the current noise (default: measured on the frame with
        :func:`estimate_white_noise`).

    Returns
    -------
    xarray.Dataset
        Processed frame (:func:`pipeline.model.make_height_frame`): ``height`` (m),
        ``height_uncertainty`` (m), ``flags``; attrs of ``raw`` plus ``work_function_eV``,
        ``work_function_uncertainty_eV``, ``height_reference`` (what zero means),
        ``height_noise_m`` (median noise σ), ``noise_floor_A``, ``current_noise_A``,
        ``reference_current_A`` (constant-height) and ``trace_lag_px`` (when both traces exist).
        ``status`` is left to :func:`pipeline.stages.quality.assess_quality`.

    Raises
    ------
    ProcessingError
        Bad parameters, an unvalidated frame, or no pixel left to convert.

    Notes
    -----
    *Constant-height*: ``h = ln(I/I_ref)/(2κ)`` (:func:`pipeline.physics.height_from_current`)
    with ``I_ref`` the median of the usable currents, so ``h = 0`` at the frame's median
    current and heights are relative to that level (the plane is removed later). Currents are
    multiplied by the sign of ``bias_V`` first, so either polarity works. Noise:
    ``σ_h = σ_I/(2κ|I|)`` with ``σ_I² = a² + (b|I|)²`` measured on the frame
    (:func:`estimate_white_noise`), i.e. an additive preamplifier floor and a multiplicative
    part, or ``σ_I = current_noise_A`` when given.

    *Constant-current*: ``h = z + ln(I/I_set)/(2κ)`` when the residual current is recorded
    (feedback-error correction, exact for any feedback lag), else ``h = z``. The noise is
    measured on the reconstructed map itself, because the piezo and current noise are
    correlated through the feedback loop; ``current_noise_A`` there only sets the default
    noise floor.

    *Pixels*: non-finite → ``NOT_RECORDED``; ``|I| ≥ 0.999·current_limit_A`` (or, without that
    attribute, a plateau of ≥ 3 identical pixels at the maximum that outnumbers the next value
    below) → ``SATURATED``; current ≤ the noise floor, including currents of the wrong sign →
    ``NOISE_FLOOR``. All three leave ``height`` NaN (decision: no interpolation here, a
    number that was never measured is not invented; the flags say why).

    *Traces*: the lag ``L`` (:func:`estimate_trace_lag`) is removed by shifting the forward
    trace by ``+L/2`` and the backward one by ``−L/2`` (mirror-extended Fourier shift, which
    keeps the noise variance), so the average sits at the true position for a symmetric lag.
    A pixel bad in one trace takes the other. Both traces come from one preamplifier and one
    feedback loop, recorded line by line: the noise model is measured on the forward trace
    and evaluated at the backward trace's own levels (measured on the backward trace only if
    the forward one gives none), which halves the cost of the noise estimates.

    *Work function*: ``∂h/∂φ = −h_φ/(2φ)`` where ``h_φ`` is the current-derived part (all of
    ``h`` relative to the reference in constant-height mode, the feedback-error term in
    constant-current mode); ``|h_φ|·σ_φ/(2φ)`` is added in quadrature. It is a scale error
    common to the whole frame, so it does not average down.

    References
    ----------
    J. Tersoff and D. R. Hamann, Phys. Rev. B 31, 805 (1985), doi:10.1103/PhysRevB.31.805;
    C. J. Chen, *Introduction to Scanning Tunneling Microscopy*, 2nd ed. (Oxford, 2008),
    doi:10.1093/acprof:oso/9780199211500.001.0001.
    """
    frame = str(raw.attrs.get("frame_id", "<frame>"))
    phi = float(work_function_eV)
    sphi = float(work_function_uncertainty_eV)
    if not (math.isfinite(phi) and phi > 0):
        raise ProcessingError(f"frame {frame}: work_function_eV = {work_function_eV!r} must be "
                              "a positive finite number of eV")
    if not (math.isfinite(sphi) and sphi >= 0):
        raise ProcessingError(f"frame {frame}: work_function_uncertainty_eV = "
                              f"{work_function_uncertainty_eV!r} must be finite and >= 0")
    if not (math.isfinite(trace_mismatch_sigma) and trace_mismatch_sigma > 0):
        raise ProcessingError(f"frame {frame}: trace_mismatch_sigma = {trace_mismatch_sigma!r} "
                              "must be > 0")
    for name, val in (("noise_floor_A", noise_floor_A), ("current_noise_A", current_noise_A)):
        if val is not None and not (math.isfinite(val) and val >= 0):
            raise ProcessingError(f"frame {frame}: {name} = {val!r} must be >= 0 A or unset")
    if "height" in raw.data_vars:
        raise ProcessingError(f"frame {frame}: already has a 'height' variable; "
                              "reconstruct_height expects a raw frame")
    mode = raw.attrs.get("mode")
    if mode not in ("constant-height", "constant-current"):
        raise ProcessingError(f"frame {frame}: attribute 'mode' = {mode!r}; expected "
                              "'constant-height' or 'constant-current'")
    _check_units(raw, frame)

    two_kappa = 2.0 * float(physics.decay_constant(phi))
    cur = raw["current"].values if "current" in raw.data_vars else None
    cur_b = raw["current_backward"].values if "current_backward" in raw.data_vars else None
    polarity = _polarity(float(raw.attrs.get("bias_V", 0.0)), cur)
    limit = _opt_limit(raw)
    opts = {"polarity": polarity, "limit_A": limit, "noise_floor_A": noise_floor_A,
            "current_noise_A": current_noise_A}
    new_attrs: dict[str, object] = {"work_function_eV": phi,
                                    "work_function_uncertainty_eV": sphi}
    notes: list[str] = []

    # one preamplifier and one feedback loop record both traces, line by line: the backward
    # trace shares the noise model measured on the forward one
    chk_f = _check_current(cur, **opts) if cur is not None else None
    chk_b = (_check_current(cur_b, **opts, shared_noise=chk_f.noise if chk_f else None)
             if cur_b is not None else None)
    backward: _Trace | None = None
    if mode == "constant-height":
        if chk_f is None:
            raise ProcessingError(f"frame {frame}: constant-height frame has no 'current'")
        good = chk_f.flags == 0
        if not good.any():
            raise ProcessingError(_nothing_left(frame, chk_f))
        i_ref = float(np.median(chk_f.signed[good]))
        forward = _constant_height_trace(chk_f, reference_A=i_ref, phi_eV=phi,
                                         two_kappa=two_kappa)
        if chk_b is not None:
            backward = _constant_height_trace(chk_b, reference_A=i_ref, phi_eV=phi,
                                              two_kappa=two_kappa)
        new_attrs["reference_current_A"] = i_ref * polarity
        new_attrs["height_reference"] = (
            f"h = ln(I/I_ref)/(2 kappa) with I_ref = {i_ref * polarity:.6g} A, the median "
            "current of the frame: zero is the surface level under the median current; no "
            "plane removed")
        if np.ptp(chk_f.signed[good]) == 0:
            notes.append("current is the same at every usable pixel: no contrast, the height "
                         "map is flat")
    else:
        setpoint = abs(float(raw.attrs["setpoint_A"]))
        forward, h_noise = _constant_current_trace(raw["z"].values, chk_f,
                                                   setpoint_A=setpoint, phi_eV=phi)
        if "z_backward" in raw.data_vars:
            backward, _ = _constant_current_trace(raw["z_backward"].values, chk_b,
                                                  setpoint_A=setpoint, phi_eV=phi,
                                                  shared_noise=h_noise)
        corrected = chk_f is not None
        new_attrs["height_reference"] = (
            "h = z" + (" + ln(I/I_set)/(2 kappa) (feedback-error correction)" if corrected
                       else " (no residual current recorded: no feedback-error correction)")
            + "; z is the piezo height (+ = retract); no plane removed")
        if chk_f is not None:
            good_i = chk_f.flags == 0
            if good_i.any():
                ratio = float(np.median(chk_f.signed[good_i])) / setpoint
                if not 0.5 <= ratio <= 2.0:
                    notes.append(f"residual current: median {ratio:.3g} x the setpoint "
                                 f"{setpoint:.4g} A; check the current's units or gain")
        if not np.isfinite(forward.height).any():
            if chk_f is not None:
                raise ProcessingError(_nothing_left(frame, chk_f))
            raise ProcessingError(f"frame {frame}: no finite z pixel to convert")

    if chk_f is not None:
        new_attrs["noise_floor_A"] = chk_f.floor_A
        new_attrs["current_noise_A"] = float(np.nanmedian(chk_f.noise.sigma)) \
            if np.isfinite(chk_f.noise.sigma).any() else math.nan

    result = forward
    if backward is not None:
        lag, rcoef = estimate_trace_lag(forward.height, backward.height)
        new_attrs["trace_lag_px"] = lag
        new_attrs["trace_correlation"] = rcoef
        if not math.isfinite(lag) or abs(lag) > _MAX_LAG_FRACTION * forward.height.shape[1]:
            notes.append(f"forward and backward traces do not match (correlation {rcoef:.2f}); "
                         "combined without lag correction")
            lag = 0.0
        if combine_traces:
            result, n_mism = _combine(forward, backward, lag_px=lag,
                                      mismatch_sigma=trace_mismatch_sigma)
            if n_mism:
                frac = n_mism / result.height.size
                notes.append(f"traces: {n_mism} pixel(s) ({100 * frac:.2f}%) differ by more "
                             f"than {trace_mismatch_sigma:g} sigma between forward and backward; "
                             "flagged, forward trace used there")

    n_sat = int(((result.flags & np.uint8(Flag.SATURATED)) != 0).sum())
    n_floor = int(((result.flags & np.uint8(Flag.NOISE_FLOOR)) != 0).sum())
    if n_sat:
        lim_txt = (f">= {_SATURATION_FRACTION * limit:.4g} A" if limit is not None
                   else "a clipped plateau at the maximum")
        notes.append(f"current: {n_sat} pixel(s) saturated ({lim_txt}); flagged, height "
                     "left undefined")
    if n_floor:
        floor = chk_f.floor_A if chk_f is not None else 0.0
        notes.append(f"current: {n_floor} pixel(s) below the noise floor ({floor:.3g} A) or "
                     f"of the wrong sign for bias_V = {raw.attrs.get('bias_V')}; flagged, "
                     "height left undefined")

    sigma_phi = np.abs(result.phi_part) * sphi / (2.0 * phi)
    unc = np.sqrt(result.sigma**2 + sigma_phi**2)
    finite_sigma = result.sigma[np.isfinite(result.sigma)]
    new_attrs["height_noise_m"] = float(np.median(finite_sigma)) if finite_sigma.size \
        else math.nan
    out = make_height_frame(raw, result.height, uncertainty=unc, flags=result.flags,
                            attrs=new_attrs)
    for msg in notes:
        add_warning(out, msg)
    return out


def _nothing_left(frame: str, chk: _CurrentCheck) -> str:
    nrec = int(((chk.flags & np.uint8(Flag.NOT_RECORDED)) != 0).sum())
    return (f"frame {frame}: no pixel left to convert into a height: {nrec} not recorded, "
            f"{chk.n_saturated} saturated, {chk.n_floor} at or below the noise floor "
            f"({chk.floor_A:.3g} A)")
