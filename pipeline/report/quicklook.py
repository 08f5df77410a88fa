"""Quick-look images of processed frames: a calibrated height image with a line profile.

Everything here is display: the data stay in SI units and are converted to nm/pm only for the
axes, the colour bar and the labels. Figures use matplotlib's object API (a
:class:`~matplotlib.figure.Figure` on an Agg canvas) so that no global pyplot state is touched and
rendering is safe in worker processes.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np
import xarray as xr
from matplotlib import colormaps
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import Colormap
from matplotlib.figure import Figure
from matplotlib.patches import Patch
from matplotlib.patheffects import withStroke
from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar
from PIL import Image
from scipy import ndimage

from pipeline._version import __version__
from pipeline.errors import IsogapError
from pipeline.model import BAD_PIXELS, frame_coords, get_warnings, parse_time

__all__ = [
    "COLORMAP",
    "FLAGGED_COLOR",
    "Profile",
    "ReportError",
    "as_number",
    "display_scale",
    "format_bias",
    "format_current",
    "format_time",
    "format_uncertain",
    "frame_warnings",
    "quicklook_figure",
    "render_quicklook",
    "render_thumbnail",
    "robust_limits",
    "steepest_profile",
]

#: The one colour map of every height image (perceptually uniform, readable in grey scale and
#: by readers with a red-green colour-vision deficiency).
COLORMAP = "viridis"

#: Neutral colour of flagged pixels: a mid grey that viridis never takes.
FLAGGED_COLOR = "#9a9a9a"

#: The steepest feature must stand this many times above the median averaged gradient (for
#: pure noise the averaged gradient's magnitude is Rayleigh distributed: max/median ≈ 2.6 over
#: ~100 independent windows, so 4 is rarely reached by chance).
DISTINCT_FEATURE_RATIO = 4.0

#: Without a distinct maximum, the mean averaged gradient is used through the centre if it is at
#: least this fraction of the mean magnitude (a staircase of many steps: one coherent slope).
COHERENT_SLOPE_FRACTION = 0.5

#: Width (inches) of the image in the quick-look figure; the figure is 6.4 inches wide.
IMAGE_WIDTH_IN = 4.3

#: Percentiles of the usable heights that set the colour limits.
CONTRAST_PERCENTILES = (1.0, 99.0)


class ReportError(IsogapError):
    """A quick-look or report cannot be made from this input."""


# --------------------------------------------------------------------------------------------
# small formatting helpers (display units)
# --------------------------------------------------------------------------------------------


def display_scale(span_m: float) -> tuple[float, str]:
    """Factor and unit for showing heights that span ``span_m`` metres: pm below 2 nm, else nm."""
    if not math.isfinite(span_m) or abs(span_m) < 2e-9:
        return 1e12, "pm"
    return 1e9, "nm"


def as_number(value: object) -> float | None:
    """A finite float from an attribute value (number, numpy scalar, text), or ``None``."""
    if value is None:
        return None
    try:
        if isinstance(value, str | bytes):
            v = float(value)
        else:
            v = float(np.asarray(value, dtype=np.float64).reshape(-1)[0])
    except (TypeError, ValueError, IndexError):
        return None
    return v if math.isfinite(v) else None


def format_bias(bias_V: float | None) -> str:
    """Sample bias for display: mV below 1 V, else V, always with its sign."""
    if bias_V is None:
        return "—"
    if abs(bias_V) < 1.0:
        return f"{bias_V * 1e3:+.0f} mV" if abs(bias_V) >= 0.01 else f"{bias_V * 1e3:+.2g} mV"
    return f"{bias_V:+.2f} V"


def format_current(current_A: float | None) -> str:
    """Current for display: pA below 1 nA, else nA."""
    if current_A is None:
        return "—"
    if abs(current_A) < 1e-9:
        return f"{current_A * 1e12:.3g} pA"
    return f"{current_A * 1e9:.3g} nA"


def format_uncertain(value: float | None, uncertainty: float | None, *, scale: float,
                     unit: str, digits: int = 3) -> str:
    """``value ± uncertainty unit`` in display units, rounded to the uncertainty's precision.

    The uncertainty keeps two significant digits when its leading digit is 1 or 2, else one
    (common practice for quoting a standard uncertainty; the GUM [1]_ asks for at most two);
    the value gets the same decimals. Without an uncertainty the value is shown with ``digits``
    significant digits.

    References
    ----------
    .. [1] JCGM 100:2008, Evaluation of measurement data — Guide to the expression of
       uncertainty in measurement, §7.2.6.
    """
    if value is None:
        return "—"
    v = value * scale
    if uncertainty is None or not uncertainty > 0:
        return f"{v:.{digits}g} {unit}"
    u = uncertainty * scale
    e = math.floor(math.log10(u))
    sig = 2 if u / 10.0**e < 3 else 1
    d = max(0, sig - 1 - e)
    return f"{v:.{d}f} ± {u:.{d}f} {unit}"


def format_time(value: object) -> str:
    """An ISO 8601 time stamp as ``YYYY-MM-DD HH:MM:SS`` (zone kept if given)."""
    if value is None or value == "":
        return "—"
    try:
        t = parse_time(str(value))
    except IsogapError:
        return str(value)
    return t.isoformat(sep=" ", timespec="seconds")


# --------------------------------------------------------------------------------------------
# data preparation
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Frame:
    """What the renderers need from a processed frame (heights in m, bad pixels as NaN)."""

    height: np.ndarray  # float64, NaN where not usable
    flagged: np.ndarray  # bool, pixels shown in the neutral colour
    x: np.ndarray  # pixel-centre coordinates, m
    y: np.ndarray
    frame_id: str


def _grid(ds: xr.Dataset) -> tuple[np.ndarray, np.ndarray]:
    ny, nx = ds["height"].shape
    if "x" in ds.coords and "y" in ds.coords:
        return np.asarray(ds["x"].values, float), np.asarray(ds["y"].values, float)
    sx, sy = as_number(ds.attrs.get("scan_size_x_m")), as_number(ds.attrs.get("scan_size_y_m"))
    if sx is None or sy is None:
        raise ReportError(
            f"frame {ds.attrs.get('frame_id', '?')}: no x/y coordinates and no "
            "scan_size_x_m/scan_size_y_m attributes, so the image has no length scale")
    return frame_coords(nx, ny, sx, sy, as_number(ds.attrs.get("scan_center_x_m")) or 0.0,
                        as_number(ds.attrs.get("scan_center_y_m")) or 0.0)


def _prepare(ds: xr.Dataset, overlay_flags: int) -> _Frame:
    if "height" not in ds.data_vars or ds["height"].ndim != 2:
        raise ReportError(f"frame {ds.attrs.get('frame_id', '?')}: no 2-D variable 'height' "
                          "(is this a processed frame?)")
    h = np.asarray(ds["height"].values, dtype=np.float64)
    flagged = ~np.isfinite(h)
    if "flags" in ds.data_vars:
        flagged |= (np.asarray(ds["flags"].values).astype(np.int64) & int(overlay_flags)) != 0
    x, y = _grid(ds)
    return _Frame(np.where(flagged, np.nan, h), flagged, x, y,
                  str(ds.attrs.get("frame_id", "frame")))


def robust_limits(height: np.ndarray, percentiles: tuple[float, float] = CONTRAST_PERCENTILES
                  ) -> tuple[float, float]:
    """Colour limits (m) from percentiles of the finite heights, never an empty interval.

    Notes
    -----
    Percentile limits keep a few tall adsorbates (or deep holes) from compressing the terraces
    into one colour. Without finite pixels the limits are (0, 1 pm); a flat frame gets ±1 pm
    around its value so that the colour bar still has a scale.
    """
    finite = height[np.isfinite(height)]
    if finite.size == 0:
        return 0.0, 1e-12
    lo, hi = (float(v) for v in np.percentile(finite, percentiles))
    if not hi > lo:
        pad = max(1e-12, abs(lo) * 1e-6)
        lo, hi = lo - pad, hi + pad
    return lo, hi


def _edges(c: np.ndarray) -> tuple[float, float]:
    """Outer edges of pixels centred at ``c`` (monotonic)."""
    step = (c[-1] - c[0]) / (c.size - 1) if c.size > 1 else 1.0
    return float(c[0] - step / 2), float(c[-1] + step / 2)


class Profile(NamedTuple):
    """A straight line profile: sample coordinates (m), heights (m), and how it was chosen."""

    x: np.ndarray
    y: np.ndarray
    height: np.ndarray
    feature: bool  #: True if the line crosses a distinct feature, False for the centre line


def steepest_profile(
    height: np.ndarray, x: np.ndarray, y: np.ndarray, *, valid: np.ndarray | None = None,
) -> Profile:
    """A straight line across the frame's steepest extended feature and the heights along it.

    Parameters
    ----------
    height : ndarray (y, x)
        Heights in m; NaN where not usable.
    x, y : ndarray
        Pixel-centre coordinates in m (monotonic).
    valid : ndarray of bool, optional
        Usable pixels (default: the finite ones).

    Returns
    -------
    Profile
        ``x``, ``y``: coordinates (m) of the sample points along the line, from one image edge
        to the other; ``height``: heights (m) there, linearly interpolated, NaN where a
        neighbour is unusable; ``feature``: whether a distinct feature was found.

    Notes
    -----
    The gradient of a lightly smoothed height (normalised convolution, so unusable pixels
    neither count nor create false edges) is averaged as a *vector* over a wider Gaussian window.
    Along a straight step the gradients point the same way and the average stays large; around a
    compact adsorbate they point in all directions and cancel. The line runs through the maximum
    of the averaged gradient, along its direction, so it crosses the largest step at right
    angles. Candidate points keep a margin of an eighth of the frame from its border. Without a
    distinct maximum (less than :data:`DISTINCT_FEATURE_RATIO` times the median) the line runs
    through the centre: along the mean averaged gradient if that is coherent (a staircase of
    many steps), else horizontally (noise, a flat frame).

    References
    ----------
    .. [1] H. Knutsson and C.-F. Westin, "Normalized and differential convolution", Proc. IEEE
       CVPR 1993, 515–523, doi:10.1109/CVPR.1993.341081 (normalised convolution).
    """
    ny, nx = height.shape
    ok = np.isfinite(height) if valid is None else (valid & np.isfinite(height))
    dx = (x[-1] - x[0]) / (nx - 1) if nx > 1 else 1.0
    dy = (y[-1] - y[0]) / (ny - 1) if ny > 1 else 1.0
    w = ok.astype(np.float64)
    point = ((nx - 1) / 2.0, (ny - 1) / 2.0)
    direction = np.array([1.0, 0.0])
    found = False
    if ok.sum() >= 4 and nx >= 3 and ny >= 3:
        num = ndimage.gaussian_filter(np.where(ok, height, 0.0), 1.0, mode="nearest")
        den = ndimage.gaussian_filter(w, 1.0, mode="nearest")
        inside = den > 0.9
        smooth = np.divide(num, den, out=np.zeros_like(num), where=den > 1e-3)
        gy, gx = np.gradient(smooth, dy, dx)
        # central differences need both neighbours usable (the image border is not a gap)
        both = ndimage.binary_erosion(inside, ndimage.generate_binary_structure(2, 1),
                                      border_value=1)
        sigma = max(3.0, min(nx, ny) / 16.0)
        vx = ndimage.gaussian_filter(np.where(both, gx, 0.0), sigma, mode="constant")
        vy = ndimage.gaussian_filter(np.where(both, gy, 0.0), sigma, mode="constant")
        mag = np.hypot(vx, vy)
        # candidates away from the border, so the line is long and its context visible
        mx, my = (min(int(max(sigma, n / 8)), (n - 1) // 2) for n in (nx, ny))
        inner = mag[my:ny - my, mx:nx - mx]
        k = int(np.argmax(inner))
        j, i = divmod(k, inner.shape[1])
        best, typical = float(inner.flat[k]), float(np.median(inner))
        mean_v = np.array([vx[my:ny - my, mx:nx - mx].mean(), vy[my:ny - my, mx:nx - mx].mean()])
        if best > 0 and best > DISTINCT_FEATURE_RATIO * typical:
            point = (float(i + mx), float(j + my))
            direction = np.array([vx[j + my, i + mx], vy[j + my, i + mx]]) / best
            found = True
        elif np.hypot(*mean_v) > COHERENT_SLOPE_FRACTION * float(inner.mean()) > 0:
            direction = mean_v / np.hypot(*mean_v)  # many parallel steps: across them
            found = True
    # line through the point (physical coordinates), clipped to the box of pixel centres
    px, py = x[0] + point[0] * dx, y[0] + point[1] * dy
    lo_x, hi_x = sorted((float(x[0]), float(x[-1])))
    lo_y, hi_y = sorted((float(y[0]), float(y[-1])))
    t_lo, t_hi = -np.inf, np.inf
    for p, u, lo, hi in ((px, direction[0], lo_x, hi_x), (py, direction[1], lo_y, hi_y)):
        if abs(u) > 1e-12:
            a, b = sorted(((lo - p) / u, (hi - p) / u))
            t_lo, t_hi = max(t_lo, a), min(t_hi, b)
    if not (math.isfinite(t_lo) and math.isfinite(t_hi)) or t_hi <= t_lo:
        t_lo, t_hi = 0.0, 0.0
    step = min(abs(dx), abs(dy))
    n = max(2, math.ceil((t_hi - t_lo) / step) + 1)
    t = np.linspace(t_lo, t_hi, n)
    xs, ys = px + t * direction[0], py + t * direction[1]
    fi, fj = (xs - x[0]) / dx, (ys - y[0]) / dy
    hs = ndimage.map_coordinates(np.where(ok, height, np.nan), [fj, fi], order=1,
                                 mode="nearest", prefilter=False)
    return Profile(xs, ys, hs, found)


# --------------------------------------------------------------------------------------------
# rendering
# --------------------------------------------------------------------------------------------


def _cmap() -> Colormap:
    return colormaps[COLORMAP].with_extremes(bad=FLAGGED_COLOR)


def _nice_length(span: float) -> float:
    """A 1-2-5 length close to a fifth of ``span``."""
    if not span > 0:
        return 1.0
    target = span / 5.0
    p = 10.0 ** math.floor(math.log10(target))
    return max((m * p for m in (1.0, 2.0, 5.0) if m * p <= target), default=p)


def _fmt_length(nm: float) -> str:
    return f"{nm:g} nm" if nm >= 1 else f"{nm * 1e3:g} pm"


def _title(ds: xr.Dataset, frame_id: str) -> tuple[str, str]:
    a = ds.attrs
    status = str(a.get("status", "")).strip()
    head = f"Frame {frame_id}" + (f"   [{status}]" if status and status != "ok" else "")
    parts = [f"started {format_time(a.get('start_time'))}"]
    if a.get("mode"):
        parts.append(str(a["mode"]))
    angle = as_number(a.get("scan_angle_deg"))
    if angle:
        parts.append(f"scan rotated {angle:g}°")
    parts.append(f"sample bias {format_bias(as_number(a.get('bias_V')))}")
    sp = as_number(a.get("setpoint_A"))
    if sp is not None:
        parts.append(f"setpoint {format_current(sp)}")
    line1 = "  ·  ".join(parts[:2])
    return head, line1 + ("\n" + "  ·  ".join(parts[2:]) if parts[2:] else "")


def _save_figure(fig: Figure, path: Path, dpi: float) -> Path:
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=dpi, format="png", metadata={"Software": f"isogap {__version__}"})
    return path


def render_quicklook(
    ds: xr.Dataset,
    path: str | os.PathLike[str],
    *,
    dpi: float = 110,
    overlay_flags: int = int(BAD_PIXELS),
) -> Path:
    """Render the quick-look PNG of one processed frame.

    The figure shows the calibrated height image (axes in nm, a scale bar, a colour bar in pm or
    nm as fits the height range), unusable pixels in a neutral grey, the line profile across the
    frame's steepest feature (drawn on the image, plotted below it) and a title from the frame's
    own attributes (id, start time, mode, bias, setpoint).

    Parameters
    ----------
    ds : xarray.Dataset
        A processed frame (:func:`pipeline.model.make_height_frame`): ``height`` in m, optional
        ``flags``, coordinates ``x``, ``y`` in m.
    path : path-like
        Output PNG file (its folder is created).
    dpi : float, optional
        Resolution. The figure is 6.4 inches wide (704 pixels at the default); its height
        follows the scan's aspect ratio (7.4 inches for a square scan).
    overlay_flags : int, optional
        Flag bits shown as grey (default :data:`pipeline.model.BAD_PIXELS`); non-finite heights
        are always grey.

    Returns
    -------
    pathlib.Path
        The written file.

    Notes
    -----
    Colour limits are the 1st and 99th percentiles of the usable heights
    (:func:`robust_limits`), so one tall adsorbate does not wash out the terraces; values
    outside are shown in the end colours (the colour bar has arrow ends). The profile follows
    :func:`steepest_profile`; a fitted step height in the frame's attributes is quoted beside it.
    The colour map is perceptually uniform (:data:`COLORMAP`), so equal height steps look like
    equal colour steps and no false edges appear [1]_.

    References
    ----------
    .. [1] F. Crameri, G. E. Shephard and P. J. Heron, "The misuse of colour in science
       communication", Nat. Commun. 11, 5444 (2020), doi:10.1038/s41467-020-19160-7.
    """
    return _save_figure(quicklook_figure(ds, overlay_flags=overlay_flags), Path(path), dpi)


def quicklook_figure(ds: xr.Dataset, *, overlay_flags: int = int(BAD_PIXELS)) -> Figure:
    """The quick-look :class:`~matplotlib.figure.Figure` of :func:`render_quicklook` (unsaved).

    Useful for embedding the figure elsewhere or inspecting it; the figure has an Agg canvas.
    """
    fr = _prepare(ds, overlay_flags)
    lo, hi = robust_limits(fr.height)
    usable = ~fr.flagged
    n_usable = int(usable.sum())
    scale, unit = display_scale(hi - lo)
    # a large common offset (unlevelled data) would make unreadable colour-bar labels
    offset = 0.0
    if n_usable and abs(lo + hi) / 2 > 20 * (hi - lo) and abs(lo + hi) / 2 > 1e-9:
        offset = float(np.median(fr.height[usable]))
    nm = 1e9
    x0, x1 = _edges(fr.x * nm)
    y0, y1 = _edges(fr.y * nm)
    width_nm, height_nm = abs(x1 - x0), abs(y1 - y0)

    # the figure follows the scan's aspect: no empty band beside wide or tall scans
    ratio = height_nm / width_nm
    if ratio <= 1:
        img_w, img_h, fig_w = IMAGE_WIDTH_IN, max(IMAGE_WIDTH_IN * ratio, 1.3), 6.4
    else:
        img_h = min(IMAGE_WIDTH_IN * ratio, 5.4)
        img_w = img_h / ratio
        fig_w = max(3.8, min(6.4, img_w + 2.2))
    fig = Figure(figsize=(fig_w, img_h + 3.1), layout="constrained")
    gs = fig.add_gridspec(2, 1, height_ratios=[img_h, 1.3])
    ax = fig.add_subplot(gs[0])
    axp = fig.add_subplot(gs[1])
    head, sub = _title(ds, fr.frame_id)
    if fig_w < 5:
        sub = sub.replace("  ·  sample bias", "\nsample bias").replace("  ·  setpoint",
                                                                      "\nsetpoint")
    fig.suptitle(head, fontsize=11, fontweight="bold")
    ax.set_title(sub, fontsize=8.5, linespacing=1.4, pad=6)

    im = ax.imshow((fr.height - offset) * scale, cmap=_cmap(), origin="lower",
                   extent=(x0, x1, y0, y1), vmin=(lo - offset) * scale,
                   vmax=(hi - offset) * scale, interpolation="antialiased",
                   interpolation_stage="rgba")
    ax.set_xlabel("x (nm)")
    ax.set_ylabel("y (nm)")
    ax.tick_params(labelsize=8)
    if n_usable:  # without usable pixels a colour scale would only mislead
        # a colour bar that hugs the drawn image (also for tall scans in a wide slot)
        cax = ax.inset_axes((1 + 0.1 / img_w, 0.0, 0.17 / img_w, 1.0))
        cb = fig.colorbar(im, cax=cax, extend="both")
        sign = "−" if offset > 0 else "+"
        label = f"height ({unit})" if offset == 0 else \
            f"height {sign} {abs(offset) * nm:.4g} nm ({unit})"
        cb.set_label(label, fontsize=9)
        cb.ax.tick_params(labelsize=8)

    bar = _nice_length(width_nm)
    sb = AnchoredSizeBar(ax.transData, bar, _fmt_length(bar), loc="lower right", pad=0.35,
                         borderpad=0.6, sep=3, color="black", frameon=True,
                         size_vertical=height_nm / 120, fontproperties={"size": 8})
    sb.patch.set(facecolor="white", alpha=0.8, edgecolor="none")
    ax.add_artist(sb)

    n_flag = int(fr.flagged.sum())
    if n_flag:
        handle = Patch(facecolor=FLAGGED_COLOR, edgecolor="0.3", linewidth=0.5,
                       label=f"flagged, not used ({100 * n_flag / fr.flagged.size:.1f} % of "
                             "pixels)")
        style = {"fontsize": 7.5, "framealpha": 0.85, "borderpad": 0.4, "handlelength": 1.2,
                 "handleheight": 1.0}
        if img_w >= 2.8:
            ax.legend(handles=[handle], loc="upper left", **style)
        else:  # too narrow to hold the note: below the figure instead
            fig.legend(handles=[handle], loc="outside lower center", **style)

    if n_usable == 0:
        ax.text(0.5, 0.5, "no usable pixels in this frame", transform=ax.transAxes,
                ha="center", va="center", fontsize=10,
                bbox={"facecolor": "white", "alpha": 0.85, "edgecolor": "none"})
        axp.text(0.5, 0.5, "no profile: every pixel is flagged", transform=axp.transAxes,
                 ha="center", va="center", fontsize=9, color="0.3")
        axp.set_xticks([])
        axp.set_yticks([])
    else:
        xs, ys, hs, feature = steepest_profile(fr.height, fr.x, fr.y, valid=usable)
        outline = [withStroke(linewidth=3, foreground="black")]
        ax.plot(xs * nm, ys * nm, color="white", linewidth=1.3, path_effects=outline)
        # end labels a little inside the line, offset to its left side
        ux, uy = xs[-1] - xs[0], ys[-1] - ys[0]
        norm = math.hypot(ux, uy) or 1.0
        perp = (-uy / norm * 8, ux / norm * 8)
        for name, f in (("A", 0.04), ("B", 0.96)):
            ax.annotate(name, ((xs[0] + f * ux) * nm, (ys[0] + f * uy) * nm), xytext=perp,
                        textcoords="offset points", color="white", fontsize=8.5,
                        fontweight="bold", path_effects=outline, ha="center", va="center")
        dist = np.hypot(xs - xs[0], ys - ys[0]) * nm
        p_scale, p_unit = display_scale(float(np.nanmax(hs) - np.nanmin(hs))
                                        if np.isfinite(hs).any() else 0.0)
        if offset:
            p_scale, p_unit = scale, unit
        axp.plot(dist, (hs - offset) * p_scale, color="#2b3a67", linewidth=1.2)
        axp.set_xlim(0, dist[-1] if dist[-1] > 0 else 1)
        prof = (hs[np.isfinite(hs)] - offset) * p_scale
        if prof.size and prof.max() - prof.min() < 2 * p_scale * 1e-12:
            mid = (prof.max() + prof.min()) / 2  # flat line: show ±1 pm, not ±0.05
            axp.set_ylim(mid - p_scale * 1e-12, mid + p_scale * 1e-12)
        axp.set_xlabel("distance along the line from A to B (nm)", fontsize=9)
        axp.set_ylabel(f"height ({p_unit})", fontsize=9)
        axp.set_title("height profile across the steepest feature" if feature else
                      "height profile along the middle row (no distinct feature)",
                      fontsize=9, loc="left")
        axp.grid(True, color="0.88", linewidth=0.6)
        axp.tick_params(labelsize=8)
        step = as_number(ds.attrs.get("step_height_m"))
        if step is not None:
            su = as_number(ds.attrs.get("step_height_uncertainty_m"))
            txt = "fitted step height " + format_uncertain(step, su, scale=1e12, unit="pm")
            axp.text(0.99, 0.06, txt, transform=axp.transAxes, ha="right", va="bottom",
                     fontsize=8, bbox={"facecolor": "white", "alpha": 0.85,
                                       "edgecolor": "0.8", "boxstyle": "round,pad=0.25"})
    FigureCanvasAgg(fig)
    return fig


def render_thumbnail(
    ds: xr.Dataset,
    path: str | os.PathLike[str],
    *,
    size_px: int = 160,
    overlay_flags: int = int(BAD_PIXELS),
) -> Path:
    """Render a small PNG of a frame's height image (no axes, same colours as the quick-look).

    Parameters
    ----------
    ds : xarray.Dataset
        A processed frame.
    path : path-like
        Output PNG file (its folder is created).
    size_px : int, optional
        Length of the longer side in pixels; the other follows the frame's physical aspect.
    overlay_flags : int, optional
        Flag bits shown in grey (default :data:`pipeline.model.BAD_PIXELS`).

    Returns
    -------
    pathlib.Path
        The written file.

    Notes
    -----
    The colour map is applied to the data array directly and the RGB image is resampled with a
    box filter (an area average), which is much faster than drawing a figure and keeps the
    report fast for runs of hundreds of frames.
    """
    if int(size_px) < 8:
        raise ReportError(f"thumbnail size_px = {size_px}; must be at least 8")
    fr = _prepare(ds, overlay_flags)
    lo, hi = robust_limits(fr.height)
    t = np.clip((fr.height - lo) / (hi - lo), 0.0, 1.0)
    rgb = (_cmap()(t)[..., :3] * 255 + 0.5).astype(np.uint8)
    # origin lower: row 0 (first y) at the bottom, as in the quick-look
    img = Image.fromarray(np.ascontiguousarray(rgb[::-1]))
    x0, x1 = _edges(fr.x)
    y0, y1 = _edges(fr.y)
    aspect = abs(x1 - x0) / abs(y1 - y0) if y1 != y0 else 1.0
    size = int(size_px)
    w, h = (size, max(1, round(size / aspect))) if aspect >= 1 else \
        (max(1, round(size * aspect)), size)
    up = w > img.width or h > img.height
    img = img.resize((w, h), Image.Resampling.NEAREST if up else Image.Resampling.BOX)
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    img.save(path, format="PNG")
    return path


def frame_warnings(ds: xr.Dataset) -> list[str]:
    """The frame's warnings (tolerant of a malformed attribute)."""
    try:
        return get_warnings(ds)
    except ValueError:
        return [str(ds.attrs.get("warnings"))]
