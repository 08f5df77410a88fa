"""Quick-look images and thumbnails of processed frames (pipeline.report.quicklook)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from matplotlib.colors import to_rgb
from PIL import Image

from pipeline.model import BAD_PIXELS, Flag, make_height_frame, make_raw_frame
from pipeline.report.quicklook import (
    FLAGGED_COLOR,
    ReportError,
    display_scale,
    format_bias,
    format_current,
    format_uncertain,
    quicklook_figure,
    render_quicklook,
    render_thumbnail,
    robust_limits,
    steepest_profile,
)

STEP_M = 235.5e-12  # Au(111) monatomic step a/√3 with a = 4.08 Å (crystal geometry, from memory)
SIZE_M = 40e-9


def make_frame(kind: str = "steps", *, n: int = 96, ny: int | None = None, size_x: float = SIZE_M,
               size_y: float = SIZE_M, angle_deg: float = 30.0, seed: int = 0,
               steps: float = 2.2, **attrs):
    """A processed frame: terraces, adsorbates, unrecorded rows, flat or all-flagged."""
    rng = np.random.default_rng(seed)
    ny = ny or n
    x = (np.arange(n) + 0.5) / n * size_x
    y = (np.arange(ny) + 0.5) / ny * size_y
    X, Y = np.meshgrid(x, y)
    t = math.radians(angle_deg)
    h = np.zeros((ny, n))
    flags = np.zeros((ny, n), np.uint8)
    if kind in ("steps", "adsorbates", "nan"):
        h += STEP_M * np.floor((X * math.cos(t) + Y * math.sin(t)) / size_x * steps)
    if kind in ("adsorbates", "nan"):
        for cx, cy in rng.uniform(0, size_x, (8, 2)):
            h += 180e-12 * np.exp(-((X - cx) ** 2 + (Y - cy) ** 2) / (2 * (0.8e-9) ** 2))
        h[10, 12] = 8e-9  # one tall adsorbate / spike
    if kind != "flat":
        h += rng.normal(0, 3e-12, h.shape)
    if kind == "nan":
        h[-15:] = np.nan
        flags[-15:] |= int(Flag.NOT_RECORDED)
        flags[30:34, 40:50] |= int(Flag.SATURATED)
    if kind == "allflag":
        flags[:] = int(Flag.NOISE_FLOOR)
    base = dict(mode="constant-current", bias_V=-0.35, setpoint_A=250e-12,
                scan_size_x_m=size_x, scan_size_y_m=size_y, line_time_s=0.1,
                start_time="2026-03-14T22:05:11", frame_id=f"q_{kind}")
    base.update(attrs)
    raw = make_raw_frame(z=np.zeros((ny, n)), attrs=base)
    return make_height_frame(raw, h, flags=flags, attrs={"status": "ok"})


KINDS = ["steps", "adsorbates", "nan", "flat", "allflag"]


@pytest.mark.parametrize("kind", KINDS)
def test_quicklook_and_thumbnail_render(kind, tmp_path):
    ds = make_frame(kind)
    before = ds.copy(deep=True)
    out = render_quicklook(ds, tmp_path / "sub" / f"{kind}.png", dpi=60)
    thumb = render_thumbnail(ds, tmp_path / f"{kind}_t.png", size_px=64)
    with Image.open(out) as im:
        # figure is 6.4 x 7.4 in (the documented size) at 60 dpi
        assert im.size == (384, 444)
        assert im.format == "PNG"
    with Image.open(thumb) as im:
        assert im.size == (64, 64)
        px = np.asarray(im.convert("RGB"))
    assert px.std() > 0 or kind in ("flat", "allflag")
    assert ds.identical(before)  # the renderers do not touch the frame


def test_thumbnail_shows_flagged_pixels_grey_and_low_y_at_bottom(tmp_path):
    ds = make_frame("steps", n=64)
    flags = ds["flags"].values.copy()
    flags[:16] |= int(Flag.NOT_RECORDED)  # first quarter of the rows = smallest y
    ds["flags"] = (("y", "x"), flags, ds["flags"].attrs)
    path = render_thumbnail(ds, tmp_path / "t.png", size_px=64)
    with Image.open(path) as im:
        rgb = np.asarray(im.convert("RGB")).astype(int)
    grey = np.round(np.array(to_rgb(FLAGGED_COLOR)) * 255).astype(int)
    # origin lower (as the quick-look): row 0 of the data is the bottom of the picture
    assert np.all(np.abs(rgb[-16:] - grey) <= 1)
    assert np.all(np.abs(rgb[:40] - grey).sum(axis=-1) > 30)


def test_thumbnail_keeps_physical_aspect(tmp_path):
    ds = make_frame("steps", n=64, ny=32, size_x=80e-9, size_y=20e-9)
    with Image.open(render_thumbnail(ds, tmp_path / "t.png", size_px=100)) as im:
        assert im.size == (100, 25)  # 80 nm x 20 nm scan: 4:1 whatever the pixel counts


def test_thumbnail_size_refused(tmp_path):
    with pytest.raises(ReportError, match="size_px = 2"):
        render_thumbnail(make_frame("flat"), tmp_path / "t.png", size_px=2)


def test_frame_without_height_is_a_clear_error(tmp_path):
    ds = make_frame("flat").drop_vars("height")
    with pytest.raises(ReportError, match="no 2-D variable 'height'"):
        render_quicklook(ds, tmp_path / "x.png")


def test_robust_limits_ignore_a_single_spike():
    ds = make_frame("adsorbates")
    h = ds["height"].values.astype(float)
    lo, hi = robust_limits(h)
    # reference: numpy's percentile of the same finite values
    ref = np.percentile(h[np.isfinite(h)], [1, 99])
    assert (lo, hi) == pytest.approx(tuple(ref), rel=0, abs=1e-18)
    # the 8 nm spike does not set the scale: the top is within the terraces + adsorbates
    assert hi < 3 * STEP_M + 200e-12
    assert robust_limits(np.full((4, 4), np.nan)) == (0.0, 1e-12)
    flat_lo, flat_hi = robust_limits(np.full((4, 4), 1e-10))
    assert flat_lo < 1e-10 < flat_hi


@pytest.mark.parametrize(("angle_deg", "steps"), [
    (0.0, 2.2), (30.0, 2.2), (65.0, 2.2), (120.0, 2.2), (40.0, 9.0),  # 9: a vicinal staircase
])
def test_profile_crosses_the_step_at_right_angles(angle_deg, steps):
    ds = make_frame("adsorbates", n=128, angle_deg=angle_deg, seed=3, steps=steps)
    h = ds["height"].values.astype(float)
    x, y = ds["x"].values, ds["y"].values
    xs, ys, hs, feature = steepest_profile(h, x, y)
    assert feature
    d = np.array([xs[-1] - xs[0], ys[-1] - ys[0]])
    d /= np.hypot(*d)
    normal = np.array([math.cos(math.radians(angle_deg)), math.sin(math.radians(angle_deg))])
    # construction: the steps run perpendicular to `normal`; pixelated edges allow ~5°
    assert abs(d @ normal) > math.cos(math.radians(6))
    # along the line heights rise by whole steps: successive terraces differ by STEP_M
    jumps = np.diff(hs[np.isfinite(hs)])
    big = jumps[np.abs(jumps) > STEP_M / 3]
    assert big.size >= 1
    # the end points lie on the frame's border (the line crosses the whole frame)
    for px, py in ((xs[0], ys[0]), (xs[-1], ys[-1])):
        on_x = min(abs(px - x[0]), abs(px - x[-1])) < 1e-12
        on_y = min(abs(py - y[0]), abs(py - y[-1])) < 1e-12
        assert on_x or on_y


def test_profile_of_flat_frame_is_horizontal_through_centre():
    ds = make_frame("flat")
    _xs, ys, hs, feature = steepest_profile(ds["height"].values.astype(float), ds["x"].values,
                                           ds["y"].values)
    assert not feature
    assert np.allclose(ys, ys[0])
    assert ys[0] == pytest.approx(float(ds["y"].values.mean()), abs=SIZE_M / 96)
    assert np.all(hs == 0)


def test_profile_skips_unrecorded_pixels():
    ds = make_frame("nan", n=96)
    h = ds["height"].values.astype(float)
    xs, ys, hs, _ = steepest_profile(h, ds["x"].values, ds["y"].values)
    assert np.isfinite(hs).sum() > 10
    # no false edge where the recorded rows end (that edge would pull the line to vertical):
    # the line still crosses the 30° terraces at right angles (construction)
    d = np.array([xs[-1] - xs[0], ys[-1] - ys[0]])
    d /= np.hypot(*d)
    normal = np.array([math.cos(math.radians(30)), math.sin(math.radians(30))])
    assert abs(d @ normal) > math.cos(math.radians(6))


def test_profile_has_a_gap_over_unrecorded_rows():
    ds = make_frame("nan", n=96, angle_deg=75.0)  # steps nearly along x: the line runs up
    h = ds["height"].values.astype(float)
    _xs, ys, hs, _ = steepest_profile(h, ds["x"].values, ds["y"].values)
    in_missing = ys > ds["y"].values[-15] + 0.6 * (ds["y"].values[1] - ds["y"].values[0])
    assert in_missing.any()
    assert np.all(np.isnan(hs[in_missing]))  # a gap, never made-up heights
    assert np.all(np.isfinite(hs[ys < ds["y"].values[-17]]))


def test_profile_of_pure_noise_is_the_centre_line():
    rng = np.random.default_rng(7)
    h = rng.normal(0, 5e-12, (64, 64))
    x = np.arange(64) * 0.2e-9
    prof = steepest_profile(h, x, x)
    assert not prof.feature
    assert np.allclose(prof.y, x[32] - 0.1e-9)  # centre of the 64 pixel centres


def test_quicklook_labels_use_display_units():
    ds = make_frame("steps", bias_V=-0.35, setpoint_A=250e-12)
    fig = quicklook_figure(ds)
    texts = [t.get_text() for ax in fig.axes for t in ax.texts] + \
        [ax.get_title() for ax in fig.axes] + [fig.get_suptitle()]
    joined = " | ".join(texts)
    assert "Frame q_steps" in joined
    assert "−350 mV" in joined or "-350 mV" in joined
    assert "250 pA" in joined
    assert "2026-03-14 22:05:11" in joined
    labels = [ax.get_ylabel() for ax in fig.axes]
    # two terraces of 235 pm span < 2 nm: the colour bar is in pm (display rule)
    assert "height (pm)" in labels
    assert fig.axes[0].get_xlabel() == "x (nm)"


def test_quicklook_nm_colour_bar_for_tall_range():
    ds = make_frame("steps")
    ds["height"] = ds["height"] * 20  # ~10 nm of height range
    fig = quicklook_figure(ds)
    assert "height (nm)" in [ax.get_ylabel() for ax in fig.axes]


def test_quicklook_flag_legend_counts_pixels():
    ds = make_frame("nan", n=96)
    fig = quicklook_figure(ds)
    legend = fig.axes[0].get_legend()
    flagged = np.isnan(ds["height"].values) | ((ds["flags"].values & int(BAD_PIXELS)) != 0)
    expected = f"{100 * flagged.mean():.1f} %"
    assert expected in legend.get_texts()[0].get_text()


@pytest.mark.parametrize(("value", "text"), [
    (0.5, "+500 mV"), (-0.35, "-350 mV"), (1.2, "+1.20 V"), (-2.0, "-2.00 V"), (None, "—"),
])
def test_format_bias(value, text):
    assert format_bias(value) == text


@pytest.mark.parametrize(("value", "text"), [
    (100e-12, "100 pA"), (1.5e-9, "1.5 nA"), (2e-9, "2 nA"), (None, "—"),
])
def test_format_current(value, text):
    assert format_current(value) == text


@pytest.mark.parametrize(("value", "unc", "text"), [
    (235.3e-12, 3.2e-12, "235 ± 3 pm"),
    (235.34e-12, 2.5e-12, "235.3 ± 2.5 pm"),  # 2 significant digits when the lead digit is 1-2
    (235.34e-12, 0.4e-12, "235.3 ± 0.4 pm"),
    (235.3e-12, None, "235 pm"),
    (None, 1e-12, "—"),
])
def test_format_uncertain(value, unc, text):
    # rounding rule: common practice for quoting a standard uncertainty (from memory)
    assert format_uncertain(value, unc, scale=1e12, unit="pm") == text


def test_display_scale():
    assert display_scale(0.5e-9) == (1e12, "pm")
    assert display_scale(5e-9) == (1e9, "nm")
    assert display_scale(float("nan")) == (1e12, "pm")


def test_frame_without_flags_variable(tmp_path):
    ds = make_frame("nan").drop_vars("flags")
    fig = quicklook_figure(ds)
    # without flags only the non-finite heights (15 of 96 rows) are grey
    assert "15.6 %" in fig.axes[0].get_legend().get_texts()[0].get_text()
    assert render_thumbnail(ds, tmp_path / "t.png").is_file()
