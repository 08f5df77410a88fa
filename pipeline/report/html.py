"""The morning-review page: one self-contained static HTML file per store.

``write_report(store, out_dir)`` writes ``out_dir/index.html`` and its images as PNG files in
``out_dir/img/`` (``full/`` quick-looks, ``thumb/`` thumbnails, ``run/`` run-level plots), all
linked relatively, so the folder can be copied anywhere and opened from disk: no server, no
network, no external style sheets, scripts or fonts.
"""

from __future__ import annotations

import html
import json
import math
import os
from collections.abc import Iterable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any
from urllib.parse import quote

import numpy as np
import xarray as xr
from PIL import Image

from pipeline._version import __version__
from pipeline.errors import IsogapError
from pipeline.io.export import OutputExistsError
from pipeline.io.store import Failure, open_store
from pipeline.model import sanitize_id
from pipeline.report.map_plot import plot_barrier_map
from pipeline.report.quicklook import (
    ReportError,
    as_number,
    format_time,
    format_uncertain,
    frame_warnings,
    render_quicklook,
    render_thumbnail,
)

try:  # helper C's plot of the approach-curve fits (optional until it exists)
    import pipeline.report.barrier_plot as _barrier_plot
except ModuleNotFoundError as _exc:  # pragma: no cover - depends on the checkout
    if _exc.name != "pipeline.report.barrier_plot":
        raise
    _barrier_plot = None

try:  # helper E's plot of the drift series (optional until it exists)
    import pipeline.report.drift_plot as _drift_plot
except ModuleNotFoundError as _exc:  # pragma: no cover - depends on the checkout
    if _exc.name != "pipeline.report.drift_plot":
        raise
    _drift_plot = None

__all__ = ["FrameRow", "write_report"]

DASH = "—"
#: Dimension of the run group's approach-curve fit table (pipeline.stages.barrier).
CURVE_DIM = "curve"
#: Dimension of the run group's drift series (pipeline.stages.drift.drift_table).
DRIFT_DIM = "drift_frame"
#: Thumbnails are drawn larger than shown (sharp on high-density screens).
THUMB_DISPLAY = 0.75
_OUR_IMAGE_DIRS = ("full", "thumb", "run")
_STATUS_TEXT = {"ok": "✓ ok", "flagged": "⚠ flagged", "failed": "✗ failed"}


def _e(value: object) -> str:
    """HTML-escape anything that came from data."""
    return html.escape(str(value), quote=True)


def _href(*parts: str) -> str:
    """A relative URL from path parts (each part percent-encoded)."""
    return "/".join(quote(p) for p in parts)


# --------------------------------------------------------------------------------------------
# per-frame rows
# --------------------------------------------------------------------------------------------


@dataclass
class FrameRow:
    """One row of the frame table (display strings, already in display units)."""

    frame_id: str
    start_time: str
    sort_key: str
    mode: str
    status: str
    warnings: list[str]
    step_height: str
    sq: str
    drift_shift: str
    work_function: str
    full_png: str | None = None  # paths relative to out_dir
    thumb_png: str | None = None
    thumb_size: tuple[int, int] = (0, 0)
    image_error: str | None = None
    extra: dict[str, str] = field(default_factory=dict)


def _drift_shift(a: dict[str, Any]) -> str:
    """The frame's drift: its displacement since the run start, else the shift applied to it.

    ``drift_displacement_*_m`` (tip relative to sample at the frame's reference time, from
    :mod:`pipeline.stages.drift`) says how far the frame has wandered; ``drift_shift_*_m`` is
    the correction applied relative to the frame's own reference and is often zero.
    """
    for prefix in ("drift_displacement", "drift_shift"):
        sx, sy = as_number(a.get(f"{prefix}_x_m")), as_number(a.get(f"{prefix}_y_m"))
        if sx is not None or sy is not None:
            break
    else:
        return DASH
    fx = f"{round(sx * 1e9, 2) + 0.0:+.2f} nm" if sx is not None else DASH  # no "−0.00"
    fy = f"{round(sy * 1e9, 2) + 0.0:+.2f} nm" if sy is not None else DASH
    return f"x {fx}\ny {fy}".replace("-", "−")


def _row(ds: xr.Dataset, fid: str) -> FrameRow:
    a = dict(ds.attrs)
    status = str(a.get("status", "")).strip() or "unknown"
    step = as_number(a.get("step_height_m"))
    sq = as_number(a.get("Sq_m"))
    phi = as_number(a.get("work_function_eV"))
    start = a.get("start_time", "")
    return FrameRow(
        frame_id=fid,
        start_time=format_time(start) if start else DASH,
        sort_key=f"{start}\x00{fid}",
        mode=str(a.get("mode") or DASH),
        status=status,
        warnings=frame_warnings(ds),
        step_height=format_uncertain(step, as_number(a.get("step_height_uncertainty_m")),
                                     scale=1e12, unit="pm"),
        sq=DASH if sq is None else f"{sq * 1e12:.1f} pm",
        drift_shift=_drift_shift(a),
        work_function=DASH if phi is None else f"{phi:.2f} eV",
    )


# --------------------------------------------------------------------------------------------
# run-level plots of the other helpers (wired only when the run group has their data)
# --------------------------------------------------------------------------------------------


def _curve_table(run: xr.Dataset) -> xr.Dataset | None:
    """The per-curve fit table of the run group (variables along ``curve``), with the run attrs."""
    names = [v for v in run.data_vars if CURVE_DIM in run[v].dims]
    if not names or run.sizes.get(CURVE_DIM, 0) == 0:
        return None
    table = run[names]
    table.attrs = dict(run.attrs)
    return table


def _drift_series(run: xr.Dataset) -> xr.Dataset | None:
    """The drift series of the run group (variables along ``drift_frame``), with the run attrs.

    The run attributes go along because they carry the drift model (velocity, kind,
    coefficients) that the drift plot draws beside the measured series.
    """
    names = [v for v in run.data_vars if DRIFT_DIM in run[v].dims]
    if not names or run.sizes.get(DRIFT_DIM, 0) == 0:
        return None
    table = run[names]
    table.attrs = dict(run.attrs)
    return table


def _save_plot(fig: Any, path: Path) -> Path:
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if getattr(fig, "canvas", None) is None or not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    fig.savefig(path, dpi=100, format="png")
    return path


def _estimate_from_attrs(attrs: dict[str, Any], table: xr.Dataset) -> Any:
    """The run's work-function estimate rebuilt from the run attributes (for the curve plot)."""
    from pipeline.stages.barrier import WorkFunctionEstimate

    phi = as_number(attrs.get("work_function_eV"))
    if phi is None:
        return None
    used = as_number(attrs.get("barrier_curves_used"))
    if used is None and "accepted" in table:
        used = float(np.asarray(table["accepted"].values).astype(bool).sum())
    return WorkFunctionEstimate(
        phi, as_number(attrs.get("work_function_uncertainty_eV")) or 0.0,
        str(attrs.get("barrier_method") or ""),
        n_curves_used=int(used) if used is not None else 0,
        model_work_function_eV=as_number(attrs.get("work_function_model_eV")),
        model_work_function_uncertainty_eV=as_number(
            attrs.get("work_function_model_uncertainty_eV")))


def _raw_curves(table: xr.Dataset, run: xr.Dataset) -> list[xr.Dataset]:
    """Read the approach curves of the fit table again from their source files.

    The store keeps the fits, not the samples, so the plot of curves and fits needs the source
    files; each is checked against the SHA-256 the run recorded for it.
    """
    from pipeline.io.readers import read_file

    if "source_file" not in table:
        raise ReportError("the curve table has no 'source_file' column")
    sources = list(dict.fromkeys(str(s) for s in table["source_file"].values))
    recorded: dict[str, str] = {}
    if "input_file" in run and "input_sha256" in run:
        recorded = {str(f): str(h) for f, h in zip(run["input_file"].values,
                                                   run["input_sha256"].values, strict=True)}
    curves = []
    for src in sources:
        if not Path(src).is_file():
            raise ReportError(f"source file {src} is not at its recorded place (the plot needs "
                              "the raw curves)")
        ds = read_file(src)
        if src in recorded and str(ds.attrs.get("source_sha256")) != recorded[src]:
            raise ReportError(f"source file {src} has changed since the run was processed")
        curves.append(ds)
    return curves


def _plot_curve_fits(run: xr.Dataset, path: Path, notes: list[str]) -> Path | None:
    table = _curve_table(run)
    if table is None or _barrier_plot is None:
        return None
    try:  # the samples come from the source files; the fits alone come from the store
        curves: list[xr.Dataset] | None = _raw_curves(table, run)
    except ReportError as exc:
        curves = None
        notes.append(f"approach curves: fits drawn from the stored table only ({exc})")
    fig = _barrier_plot.plot_approach_curves(curves, table, _estimate_from_attrs(run.attrs, table),
                                             path)
    if not path.is_file() and fig is not None:
        _save_plot(fig, path)
    return path if path.is_file() else None


def _plot_drift(run: xr.Dataset, path: Path, notes: list[str]) -> Path | None:
    table = _drift_series(run)
    if table is None or _drift_plot is None:
        return None
    fig = _drift_plot.plot_drift(table, path=path)
    if not path.is_file() and fig is not None:
        _save_plot(fig, path)
    return path if path.is_file() else None


# --------------------------------------------------------------------------------------------
# output folder handling
# --------------------------------------------------------------------------------------------


def _prepare_out_dir(out: Path, overwrite: bool) -> None:
    if out.exists() and not out.is_dir():
        raise ReportError(f"report folder {out} exists and is not a folder")
    if out.is_dir() and any(out.iterdir()):
        if not overwrite:
            raise OutputExistsError(
                f"report folder {out} is not empty; pass overwrite=True (--overwrite) to "
                "replace the report in it, or choose another folder")
        # remove only what an earlier report wrote: its page and its images
        (out / "index.html").unlink(missing_ok=True)
        for sub in _OUR_IMAGE_DIRS:
            for old in (out / "img" / sub).glob("*.png"):
                old.unlink()
    for sub in _OUR_IMAGE_DIRS:
        (out / "img" / sub).mkdir(parents=True, exist_ok=True)


# --------------------------------------------------------------------------------------------
# HTML
# --------------------------------------------------------------------------------------------

_CSS = """
:root { --ink:#1d2433; --muted:#5b6474; --line:#d9dee7; --band:#f4f6f9; --head:#e9edf3;
  --ok:#17663a; --ok-bg:#e2f3e8; --fl:#7a4b00; --fl-bg:#fff0cf; --bad:#9b1c1c; --bad-bg:#fde3e3;
  --link:#1f4fa3; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff; line-height: 1.45;
  font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial,
  sans-serif; }
header.top { padding: 18px 28px 14px; border-bottom: 1px solid var(--line);
  background: var(--band); }
h1 { margin: 0 0 4px; font-size: 1.45rem; }
h2 { font-size: 1.12rem; margin: 26px 0 10px; }
.meta { margin: 0; color: var(--muted); font-size: .9rem; }
.meta span + span::before { content: "·"; margin: 0 .5em; color: #9aa3b2; }
main { padding: 4px 28px 36px; }
a { color: var(--link); }
nav.jump { margin-top: 10px; font-size: .9rem; }
nav.jump a { margin-right: 1.1em; }
.counts { display: flex; gap: 10px; flex-wrap: wrap; margin: 12px 0 0; padding: 0;
  list-style: none; }
.counts li { padding: 4px 12px; border-radius: 999px; font-weight: 600; font-size: .92rem;
  border: 1px solid transparent; }
.s-ok { color: var(--ok); background: var(--ok-bg); border-color: #b9e0c7 !important; }
.s-flagged { color: var(--fl); background: var(--fl-bg); border-color: #f0d08a !important; }
.s-failed, .s-unknown { color: var(--bad); background: var(--bad-bg);
  border-color: #f3b4b4 !important; }
.s-total { color: var(--ink); background: #fff; border-color: var(--line) !important; }
.summary { display: grid; grid-template-columns: max-content 1fr; gap: 4px 18px;
  margin: 0; font-size: .95rem; }
.summary dt { color: var(--muted); }
.summary dd { margin: 0; font-variant-numeric: tabular-nums; }
.plots { display: flex; flex-wrap: wrap; gap: 18px; margin-top: 14px; }
.plots figure { margin: 0; flex: 1 1 420px; max-width: 640px; border: 1px solid var(--line);
  border-radius: 6px; padding: 8px; background: #fff; }
.plots figure.wide { flex-basis: 100%; max-width: 900px; }
.plots img { width: 100%; height: auto; display: block; }
figcaption { font-size: .85rem; color: var(--muted); margin-top: 4px; }
.note { color: var(--muted); font-size: .9rem; }
table { border-collapse: separate; border-spacing: 0; width: 100%; font-size: .9rem; }
thead th { position: sticky; top: 0; z-index: 2; background: var(--head); text-align: left;
  font-weight: 600; padding: 8px 8px; border-bottom: 2px solid #c3cad6;
  white-space: nowrap; }
tbody td { padding: 5px 8px; border-bottom: 1px solid var(--line); vertical-align: middle; }
tbody tr:nth-child(even) td { background: #fafbfc; }
tbody tr:hover td { background: #eef3fb; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
th.num { text-align: right; }
td.id { font-weight: 600; white-space: nowrap; }
td.time { white-space: nowrap; font-variant-numeric: tabular-nums; }
td.thumb { width: 1%; padding: 4px 8px; }
td.thumb img { display: block; border: 1px solid var(--line); border-radius: 3px;
  image-rendering: auto; }
.badge { display: inline-block; padding: 1px 9px; border-radius: 999px; font-weight: 600;
  font-size: .85rem; white-space: nowrap; border: 1px solid transparent; }
td.warn { min-width: 11em; max-width: 30em; color: #3d4555; }
td.mode { white-space: nowrap; }
td.warn ul { margin: 4px 0 0; padding-left: 1.2em; }
details summary { cursor: pointer; }
table.failures td.msg { white-space: pre-wrap; font-family: ui-monospace, SFMono-Regular,
  Menlo, Consolas, monospace; font-size: .83rem; }
pre.config { background: var(--band); border: 1px solid var(--line); padding: 10px;
  overflow: auto; max-height: 28em; font-size: .8rem; }
footer { color: var(--muted); font-size: .82rem; padding: 14px 28px 24px;
  border-top: 1px solid var(--line); }
"""


def _badge(status: str) -> str:
    key = status if status in ("ok", "flagged", "failed") else "unknown"
    text = _STATUS_TEXT.get(status, f"? {status}")
    return f'<span class="badge s-{key}">{_e(text)}</span>'


def _warnings_cell(ws: list[str]) -> str:
    if not ws:
        return DASH
    if len(ws) == 1:
        return _e(ws[0])
    items = "".join(f"<li>{_e(w)}</li>" for w in ws)
    return (f"<details><summary>{len(ws)} warnings: {_e(ws[0][:60])}"
            f"{'…' if len(ws[0]) > 60 else ''}</summary><ul>{items}</ul></details>")


def _frame_rows_html(rows: Iterable[FrameRow]) -> str:
    out = []
    for r in rows:
        if r.thumb_png and r.full_png:
            w, h = (round(v * THUMB_DISPLAY) for v in r.thumb_size)
            thumb = (f'<a href="{_e(r.full_png)}"><img src="{_e(r.thumb_png)}" width="{w}" '
                     f'height="{h}" alt="height image of frame {_e(r.frame_id)}"></a>')
            fid = f'<a href="{_e(r.full_png)}">{_e(r.frame_id)}</a>'
        else:
            thumb = f'<span class="note">no image: {_e(r.image_error or "not rendered")}</span>'
            fid = _e(r.frame_id)
        out.append(
            f'<tr data-frame="{_e(r.frame_id)}" data-status="{_e(r.status)}">'
            f'<td class="thumb">{thumb}</td><td class="id">{fid}</td>'
            f'<td class="time">{_e(r.start_time)}</td><td class="mode">{_e(r.mode)}</td>'
            f"<td>{_badge(r.status)}</td><td class=\"warn\">{_warnings_cell(r.warnings)}</td>"
            f'<td class="num">{_e(r.step_height)}</td><td class="num">{_e(r.sq)}</td>'
            f'<td class="num">{_e(r.drift_shift).replace(chr(10), "<br>")}</td>'
            f'<td class="num">{_e(r.work_function)}</td></tr>')
    return "\n".join(out)


def _failures_html(failures: list[Failure]) -> str:
    if not failures:
        return '<p class="note">No input failed.</p>'
    rows = "\n".join(
        f'<tr><td class="id">{_e(f.file)}</td><td>{_e(f.stage)}</td>'
        f'<td class="msg">{_e(f.message)}</td></tr>' for f in failures)
    return ('<table class="failures"><thead><tr><th>file</th><th>stage</th><th>message</th>'
            f"</tr></thead><tbody>\n{rows}\n</tbody></table>")


def _text_list(value: object) -> list[str]:
    """A list of messages from an attribute holding a JSON list (or one plain message)."""
    if value is None or value == "":
        return []
    try:
        parsed = json.loads(str(value))
    except ValueError:
        return [str(value)]
    return [str(v) for v in parsed] if isinstance(parsed, list) else [str(parsed)]


def _signed(text: str) -> str:
    """Put an explicit + on a formatted positive number."""
    return text if text.startswith(("-", "−", "—")) else f"+{text}"


def _run_summary(run: xr.Dataset) -> list[tuple[str, str]]:
    a = run.attrs
    phi = as_number(a.get("work_function_eV"))
    phi_u = as_number(a.get("work_function_uncertainty_eV"))
    items = [("work function (barrier height used)",
              format_uncertain(phi, phi_u, scale=1.0, unit="eV")),
             ("method", str(a.get("barrier_method") or DASH))]
    if "curve" in run.dims:
        n = run.sizes["curve"]
        used = ""
        if "accepted" in run.data_vars:
            used = f", {int(np.asarray(run['accepted'].values).astype(bool).sum())} used"
        items.append(("approach curves", f"{n} fitted{used}"))
    vx = as_number(a.get("drift_velocity_x_m_per_s"))
    vy = as_number(a.get("drift_velocity_y_m_per_s"))
    label = "drift velocity (tip relative to sample)"
    if vx is None and vy is None:
        items.append((label, DASH))
    else:
        per_min = 1e9 * 60.0  # m/s -> nm/min
        parts = []
        for axis, v in (("x", vx), ("y", vy)):
            u = as_number(a.get(f"drift_velocity_uncertainty_{axis}_m_per_s"))
            parts.append(f"{axis} " + (DASH if v is None else _signed(format_uncertain(
                v, u, scale=per_min, unit="", digits=3).strip())))
        text = ", ".join(parts) + " nm/min"
        if vx is not None and vy is not None:
            text += f"; |v| = {math.hypot(vx, vy) * per_min:.3g} nm/min"
        items.append((label, text.replace("-", "−")))
        model = a.get("drift_model")
        if model:
            used, rejected = a.get("drift_pairs_used"), a.get("drift_pairs_rejected")
            pairs = f", {used} frame pair(s) used" if used is not None else ""
            pairs += f", {rejected} rejected" if rejected not in (None, 0) else ""
            items.append(("drift model", f"{model}{pairs}"))
    vz = as_number(a.get("z_drift_rate_m_per_s"))
    if vz is not None:
        uz = as_number(a.get("z_drift_rate_uncertainty_m_per_s"))
        items.append(("z creep rate", _signed(format_uncertain(
            vz, uz, scale=1e9 * 60.0, unit="nm/min")).replace("-", "−")))
    vux, vuy = (as_number(a.get(f"drift_updown_velocity_{k}_m_per_s")) for k in ("x", "y"))
    if vux is not None and vuy is not None:
        items.append(("drift from up/down frame pairs", (
            f"x {vux * 6e10:+.3f}, y {vuy * 6e10:+.3f} nm/min "
            f"({a.get('drift_updown_pairs', '?')} pair(s))").replace("-", "−")))
    step = as_number(a.get("step_consensus_m"))
    if step is not None:  # a scatter, not an uncertainty: shown apart
        scatter = as_number(a.get("step_consensus_scatter_m"))
        spread = f" (frames scatter {scatter * 1e12:.1f} pm)" if scatter is not None else ""
        items.append(("unit step the frames agree on", f"{step * 1e12:.1f} pm{spread}"))
    for key, label in (("z_scale_factor", "z scale factor from known steps"),
                       ("lateral_scale_x", "x scale factor from the lattice"),
                       ("lateral_scale_y", "y scale factor from the lattice")):
        v = as_number(a.get(key))
        if v is not None:
            items.append((label, format_uncertain(
                v, as_number(a.get(f"{key}_uncertainty")), scale=1.0, unit="").strip()))
    skew = as_number(a.get("lateral_skew_deg"))
    if skew is not None:
        items.append(("lattice skew (not corrected)", f"{skew:+.3f}°".replace("-", "−")))
    return items


def _page(*, attrs: dict[str, Any], store: Path, rows: list[FrameRow], run: xr.Dataset,
          failures: list[Failure], plots: list[tuple[str, str, str]], notes: list[str]) -> str:
    title = str(attrs.get("title") or "isogap run")
    n_ok = sum(r.status == "ok" for r in rows)
    n_fl = len(rows) - n_ok
    n_fail = len(failures)
    meta = [f"store {store.name}", f"created {format_time(attrs.get('created'))}",
            f"software {attrs.get('software', DASH)}"]
    sha = run.attrs.get("config_sha256")
    if sha:
        meta.append(f"config sha256 {str(sha)[:12]}…")
    counts = (f'<li class="s-total">{len(rows)} frames</li>'
              f'<li class="{"s-ok" if n_ok else "s-total"}">✓ {n_ok} ok</li>'
              f'<li class="{"s-flagged" if n_fl else "s-total"}">⚠ {n_fl} flagged</li>'
              f'<li class="{"s-failed" if n_fail else "s-total"}">✗ {n_fail} failed</li>')
    summary = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in _run_summary(run))
    figs = "".join(f'<figure class="{kind}"><a href="{_e(src)}"><img src="{_e(src)}" '
                   f'alt="{_e(cap)}"></a><figcaption>{_e(cap)}</figcaption></figure>'
                   for src, cap, kind in plots)
    note_html = "".join(f'<p class="note">{_e(n)}</p>' for n in notes)
    config = run.attrs.get("config_toml")
    config_html = (f'<details><summary>effective configuration</summary>'
                   f'<pre class="config">{_e(config)}</pre></details>' if config else "")
    failed_section = (f'<section id="failures"><h2>Failed inputs ({n_fail})</h2>'
                      f"{_failures_html(failures)}</section>")
    generated = datetime.now(UTC).isoformat(timespec="seconds")
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="isogap {_e(__version__)}">
<title>{_e(title)} — run review</title>
<style>{_CSS}</style>
</head>
<body>
<header class="top">
<h1>{_e(title)}</h1>
<p class="meta">{"".join(f"<span>{_e(m)}</span>" for m in meta)}</p>
<ul class="counts" aria-label="frame counts">{counts}</ul>
<nav class="jump"><a href="#run">run summary</a><a href="#frames">frames</a>\
<a href="#failures">failed inputs</a></nav>
</header>
<main>
{failed_section if n_fail else ""}
<section id="run"><h2>Run summary</h2>
<dl class="summary">{summary}</dl>
{f'<div class="plots">{figs}</div>' if figs else ""}
{note_html}
{config_html}
</section>
<section id="frames"><h2>Frames ({len(rows)})</h2>
<table class="frames">
<thead><tr><th>image</th><th>frame</th><th>start time</th><th>mode</th><th>status</th>
<th>warnings</th><th class="num">step height</th><th class="num">Sq</th>
<th class="num" title="drift displacement of the tip relative to the sample since the run \
start (or the shift applied to the frame)">drift</th><th class="num">work function</th></tr></thead>
<tbody>
{_frame_rows_html(rows)}
</tbody>
</table>
{'' if rows else '<p class="note">The store holds no frames.</p>'}
</section>
{"" if n_fail else failed_section}
</main>
<footer>Page written {_e(generated)} by isogap {_e(__version__)} from {_e(store)}.
Click a thumbnail or frame id for its full quick-look image.</footer>
</body>
</html>
"""


def write_report(
    store_path: str | os.PathLike[str],
    out_dir: str | os.PathLike[str],
    *,
    overwrite: bool = False,
    thumbnail_px: int = 128,
    dpi: float = 110,
) -> Path:
    """Write the static HTML morning-review page of a store.

    Parameters
    ----------
    store_path : path-like
        An isogap store.
    out_dir : path-like
        Folder for ``index.html`` and ``img/`` (created if missing).
    overwrite : bool, optional
        Allow writing into a non-empty folder; the page and the images of an earlier report
        there are replaced, other files are left alone.
    thumbnail_px : int, optional
        Longer side of the thumbnails in pixels.
    dpi : float, optional
        Resolution of the full quick-look images.

    Returns
    -------
    pathlib.Path
        The written ``index.html``.

    Raises
    ------
    OutputExistsError
        ``out_dir`` exists, is not empty and ``overwrite`` is false.
    pipeline.errors.StoreError
        The store cannot be read.

    Notes
    -----
    Frames are read, drawn and released one at a time, so memory does not grow with the run.
    A frame whose image cannot be drawn still gets its table row, with the reason. Every text
    that comes from data (ids, attributes, messages) is HTML-escaped. Missing attributes (a
    stage that did not run) show as "—". The approach-curve plot and the drift plot are added
    when the run group holds a curve table or a drift series and the plotting modules
    (:mod:`pipeline.report.barrier_plot`, :mod:`pipeline.report.drift_plot`) are installed.
    """
    store = open_store(store_path)
    out = Path(out_dir)
    _prepare_out_dir(out, overwrite)
    rows: list[FrameRow] = []
    for fid in store.frame_ids:
        ds = store.frame(fid)
        row = _row(ds, fid)
        name = sanitize_id(fid)
        try:
            full = render_quicklook(ds, out / "img" / "full" / f"{name}.png", dpi=dpi)
            thumb = render_thumbnail(ds, out / "img" / "thumb" / f"{name}.png",
                                     size_px=thumbnail_px)
        except IsogapError as exc:
            row.image_error = str(exc)
        else:
            row.full_png = _href("img", "full", full.name)
            row.thumb_png = _href("img", "thumb", thumb.name)
            with Image.open(thumb) as im:
                row.thumb_size = im.size
        rows.append(row)
        del ds
    rows.sort(key=lambda r: r.sort_key)

    run = store.run()
    plots: list[tuple[str, str, str]] = []
    notes = [f"drift: {w}" for w in _text_list(run.attrs.get("drift_warnings"))]
    for maker, fname, caption, kind in (
        (_plot_curve_fits, "approach_curves.png", "Approach-curve fits: apparent barrier "
         "height of each curve and the run estimate", "wide"),
        (_plot_drift, "drift.png", "Drift over the run (tip relative to sample)", "normal"),
    ):
        try:
            made = maker(run, out / "img" / "run" / fname, notes)
        except IsogapError as exc:
            notes.append(f"{caption.split(':')[0]}: plot not drawn ({exc})")
            continue
        if made is not None:
            plots.append((_href("img", "run", fname), caption, kind))
    for map_id in store.map_ids:
        fname = f"map_{sanitize_id(map_id)}.png"
        plot_barrier_map(store.barrier_map(map_id), out / "img" / "run" / fname, name=map_id,
                         dpi=dpi)
        plots.append((_href("img", "run", fname), f"Apparent-barrier map from the curve grid "
                      f"{map_id}", "wide"))
    page = _page(attrs=store.attrs, store=store.path, rows=rows, run=run,
                 failures=store.failures(), plots=plots, notes=notes)
    index = out / "index.html"
    tmp = out / f".index.html.{os.getpid()}.tmp"
    tmp.write_text(page, encoding="utf-8")
    os.replace(tmp, index)
    return index
