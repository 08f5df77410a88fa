"""The ``isogap`` command line: parse, call one library function, report. No physics here.

Exit status: 0 when everything was processed, 1 when some inputs failed (the rest is still in the
store and the failures are recorded), 2 for usage, configuration or store-access errors.
"""

from __future__ import annotations

import logging
import sys
import time
from pathlib import Path
from typing import Annotated, Any

import typer
from rich.console import Console
from rich.markup import escape
from rich.table import Table

from pipeline.errors import IsogapError, ProcessingError

app = typer.Typer(
    help="Calibrated height maps from a night of raw STM scans.",
    no_args_is_help=True, add_completion=False, pretty_exceptions_enable=False)
config_app = typer.Typer(help="Inspect and validate configuration files.", no_args_is_help=True)
app.add_typer(config_app, name="config")

out = Console()
err = Console(stderr=True)
log = logging.getLogger("pipeline")

# shared options, defined once
StoreOpt = Annotated[Path, typer.Option("--store", "-s", help="output HDF5 store")]
ConfigOpt = Annotated[Path | None, typer.Option(
    "--config", "-c", help="TOML config file (default: built-in defaults)",
    exists=False, dir_okay=False)]
WorkersOpt = Annotated[int | None, typer.Option(
    "--workers", "-j", min=0, help="worker processes (0 = all cores; overrides config)")]
ExecutorOpt = Annotated[str | None, typer.Option(
    "--executor", help="serial, processes or dask (overrides config)")]
SchedulerOpt = Annotated[str | None, typer.Option(
    "--scheduler", help="Dask scheduler address tcp://HOST:PORT (implies --executor dask)")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="print only errors and the "
                                        "final line")]
VerboseOpt = Annotated[int, typer.Option("--verbose", "-v", count=True,
                                         help="more log output (-vv for debug)")]


def _fail(message: str, code: int = 2) -> typer.Exit:
    err.print(f"[bold red]error:[/] {escape(message)}", highlight=False, soft_wrap=True)
    return typer.Exit(code)


def _setup_logging(verbose: int, quiet: bool) -> None:
    level = logging.ERROR if quiet else (logging.WARNING, logging.INFO, logging.DEBUG)[
        min(verbose, 2)]
    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(logging.Formatter("%(levelname)s %(name)s: %(message)s"))
    log.handlers[:] = [handler]
    log.setLevel(level)
    log.propagate = False


def _load_config(path: Path | None, *, workers: int | None = None, executor: str | None = None,
                 scheduler: str | None = None) -> Any:
    from pipeline.config import load_config, with_run_overrides

    return with_run_overrides(load_config(path), workers=workers, executor=executor,
                              scheduler=scheduler)


def _nm_per_min(v_m_per_s: float) -> float:
    return v_m_per_s * 1e9 * 60.0


def _drift_line(vx_m_per_s: float, vy_m_per_s: float) -> str:
    """The run's drift velocity, or that it could not be measured (NaN: no usable frame pair)."""
    if vx_m_per_s == vx_m_per_s and vy_m_per_s == vy_m_per_s:
        return (f"drift {_nm_per_min(vx_m_per_s):+.3f}, {_nm_per_min(vy_m_per_s):+.3f} nm/min "
                "(x, y)")
    return "drift not measured (no frame pair registered reliably); frames not drift-corrected"


def _fmt_pm(value: Any) -> str:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return "—"
    return "—" if v != v else f"{v * 1e12:.1f}"


# --------------------------------------------------------------------------------------------
# process
# --------------------------------------------------------------------------------------------


@app.command()
def process(
    run_dir: Annotated[Path, typer.Argument(help="folder of raw files from one run")],
    store: StoreOpt,
    config: ConfigOpt = None,
    workers: WorkersOpt = None,
    executor: ExecutorOpt = None,
    scheduler: SchedulerOpt = None,
    follow: Annotated[bool, typer.Option(
        "--follow", help="keep watching the folder for new files until interrupted")] = False,
    poll_s: Annotated[float, typer.Option(
        "--poll-s", min=0.1, help="with --follow: seconds between looks at the folder")] = 10.0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = 0,
) -> None:
    """Process a run folder into a store (rerunning resumes and updates it)."""
    from pipeline.batch import run_batch
    from pipeline.errors import ConfigError

    _setup_logging(verbose, quiet)
    try:
        cfg = _load_config(config, workers=workers, executor=executor, scheduler=scheduler)
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    if follow:
        from pipeline.follow import follow_folder

        try:
            code = follow_folder(run_dir, store, cfg, poll_s=poll_s,
                                 on_summary=lambda s: _print_summary(s, quiet=quiet),
                                 on_event=_Progress(quiet).event)
        except (ConfigError, IsogapError) as exc:
            raise _fail(str(exc)) from None
        raise typer.Exit(code)
    progress = _Progress(quiet)
    try:
        with progress:
            summary = run_batch(run_dir, store, cfg, on_event=progress.event,
                                history=f"isogap process {run_dir} --store {store}")
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    _print_summary(summary, quiet=quiet)
    raise typer.Exit(summary.exit_code)


class _Progress:
    """Renders batch events: a rich progress bar on a terminal, plain log lines otherwise."""

    def __init__(self, quiet: bool):
        self.quiet = quiet
        self.live = err.is_terminal and not quiet
        self._bar: Any = None
        self._tasks: dict[str, Any] = {}
        self._counts: dict[str, list[Any]] = {}

    def __enter__(self) -> _Progress:
        if self.live:
            from rich.progress import (
                BarColumn,
                MofNCompleteColumn,
                Progress,
                TextColumn,
                TimeElapsedColumn,
                TimeRemainingColumn,
            )

            self._bar = Progress(TextColumn("{task.description:<14}"), BarColumn(),
                                 MofNCompleteColumn(), TextColumn("{task.speed} /s"),
                                 TimeElapsedColumn(), TimeRemainingColumn(), console=err)
            self._bar.start()
        return self

    def __exit__(self, *exc: object) -> None:
        if self._bar is not None:
            self._bar.stop()

    def event(self, ev: Any) -> None:
        if ev.kind == "failure":
            (self._bar.console if self._bar else err).print(
                f"[red]failed:[/] {escape(ev.message)}", highlight=False, soft_wrap=True)
        elif ev.kind == "warning":
            if not self.quiet:
                (self._bar.console if self._bar else err).print(
                    f"[yellow]warning:[/] {escape(ev.message)}", highlight=False,
                    soft_wrap=True)
        elif ev.kind == "pass":
            if self._bar is not None:
                self._tasks[ev.name] = self._bar.add_task(ev.name, total=ev.total or None)
            else:
                self._counts[ev.name] = [0, ev.total, time.monotonic()]
                if not self.quiet:
                    err.print(f"{ev.name}: {ev.total} task(s)", highlight=False)
        elif ev.kind == "advance":
            if self._bar is not None and ev.name in self._tasks:
                self._bar.advance(self._tasks[ev.name])
            elif ev.name in self._counts and not self.quiet:
                self._log_line(ev.name)

    def _log_line(self, name: str) -> None:
        """Plain progress for logs (cron, pipes): about every tenth of a pass."""
        c = self._counts[name]
        c[0] += 1
        done, total, t0 = c
        if total > 1 and (done == total or done % max(1, total // 10) == 0):
            rate = done / max(time.monotonic() - t0, 1e-9)
            eta = (total - done) / rate if rate > 0 else float("nan")
            err.print(f"{name}: {done}/{total} done, {rate:.2f}/s, about {eta:.0f} s left",
                      highlight=False)


def _print_summary(summary: Any, *, quiet: bool) -> None:
    if not quiet:
        t = Table(title=f"run summary — {summary.store}", show_header=True)
        for col in ("inputs", "curve files", "frames", "ok", "flagged", "failed", "reused",
                    "time"):
            t.add_column(col, justify="right")
        t.add_row(str(summary.n_inputs), str(summary.n_curves_files), str(summary.n_frames),
                  str(summary.n_ok),
                  str(summary.n_flagged), str(len(summary.failures)), str(summary.n_reused),
                  f"{summary.seconds:.1f} s")
        out.print(t)
        out.print(f"work function {summary.work_function_eV:.3f} ± "
                  f"{summary.work_function_uncertainty_eV:.3f} eV", highlight=False)
        if summary.drift_velocity_m_per_s:
            out.print(_drift_line(*summary.drift_velocity_m_per_s), highlight=False)
    line = (f"{summary.n_frames} frame(s) in {summary.store}, "
            f"{len(summary.failures)} input(s) failed")
    (err if summary.failures else out).print(line, highlight=False)


# --------------------------------------------------------------------------------------------
# show / reprocess
# --------------------------------------------------------------------------------------------


@app.command()
def show(store: Annotated[Path, typer.Argument(help="an isogap store")]) -> None:
    """List a store's frames with status and key numbers."""
    from pipeline.io.store import open_store
    from pipeline.model import get_warnings

    try:
        st = open_store(store)
        run = st.run()
        failures = st.failures()
        t = Table(title=f"{store} — {st.attrs.get('title', '')}")
        for col, just in (("frame", "left"), ("mode", "left"), ("start time", "left"),
                          ("status", "left"), ("step / pm", "right"), ("Sq / pm", "right"),
                          ("warnings", "right")):
            t.add_column(col, justify=just)  # type: ignore[arg-type]
        for fid in st.frame_ids:
            frame = st.frame(fid)
            a = frame.attrs
            status = str(a.get("status", "?"))
            mode = {"constant-current": "CC", "constant-height": "CH"}.get(
                str(a.get("mode", "")), "?")
            t.add_row(fid, mode, str(a.get("start_time", "")).replace("T", " ")[:19],
                      status if status == "ok" else f"[yellow]{status}[/]",
                      _fmt_pm(a.get("step_height_m")), _fmt_pm(a.get("Sq_m")),
                      str(len(get_warnings(frame))))
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    out.print(t)
    out.print("mode: CC = constant current, CH = constant height", style="dim")
    ra = run.attrs
    out.print(f"work function: {float(ra.get('work_function_eV', float('nan'))):.3f} ± "
              f"{float(ra.get('work_function_uncertainty_eV', float('nan'))):.3f} eV "
              f"({ra.get('barrier_method', '?')})", highlight=False)
    if "drift_model" in ra:
        out.print(_drift_line(float(ra.get("drift_velocity_x_m_per_s", float("nan"))),
                              float(ra.get("drift_velocity_y_m_per_s", float("nan")))),
                  highlight=False)
    if failures:
        out.print(f"[red]{len(failures)} failed input(s):[/]")
        for f in failures:
            out.print(escape(f"  {f.file} ({f.stage}): {f.message}"), highlight=False,
                      soft_wrap=True)


@app.command()
def reprocess(
    store: Annotated[Path, typer.Argument(help="an existing isogap store")],
    config: ConfigOpt = None,
    new_store: Annotated[Path | None, typer.Option(
        "--store", "-s", help="write to this store instead of replacing STORE")] = None,
    workers: WorkersOpt = None,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = 0,
) -> None:
    """Re-run a store's source files with its stored config (or a new one)."""
    from pipeline.reprocess import reprocess_store

    _setup_logging(verbose, quiet)
    progress = _Progress(quiet)
    try:
        with progress:
            summary = reprocess_store(store, config_path=config, out_store=new_store,
                                      workers=workers, on_event=progress.event)
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    _print_summary(summary, quiet=quiet)
    raise typer.Exit(summary.exit_code)


# --------------------------------------------------------------------------------------------
# config
# --------------------------------------------------------------------------------------------


@config_app.command("show")
def config_show(
    file: Annotated[Path | None, typer.Argument(help="config file (default: built-in)")] = None,
) -> None:
    """Print the effective configuration (every key) as TOML."""
    from pipeline.config import dump_toml, load_config

    try:
        cfg = load_config(file)
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    sys.stdout.write(dump_toml(cfg))


@config_app.command("check")
def config_check(file: Annotated[Path, typer.Argument(help="config file to validate")]) -> None:
    """Validate a config file; exit 2 with the problems if it is not valid."""
    from pipeline.config import load_config

    try:
        load_config(file)
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    out.print(f"{file}: valid", highlight=False)


# --------------------------------------------------------------------------------------------
# simulate / barrier / report / export
# --------------------------------------------------------------------------------------------


@app.command()
def simulate(
    out_dir: Annotated[Path, typer.Argument(help="folder to write the synthetic run into")],
    seed: Annotated[int, typer.Option("--seed", help="random seed (same seed, same files)")] = 1,
    preset: Annotated[str, typer.Option("--preset", help="run preset: sample, tiny")] = "sample",
    overwrite: Annotated[bool, typer.Option("--overwrite",
                                            help="replace the folder's contents")] = False,
) -> None:
    """Write a physics-based synthetic run with its ground truth (in OUT_DIR/truth)."""
    from pipeline.io.simrun import write_run
    from pipeline.simulate import preset as get_preset

    try:
        spec = get_preset(preset)
        path = write_run(out_dir, spec, seed=seed, overwrite=overwrite)
    except (IsogapError, KeyError) as exc:
        raise _fail(str(exc).strip("'\"")) from None
    out.print(f"synthetic run '{preset}' (seed {seed}) written to {path}", highlight=False)


@app.command()
def barrier(
    files: Annotated[list[Path], typer.Argument(help="files holding approach curves")],
    plot: Annotated[Path | None, typer.Option("--plot", help="write a PNG of the fits")] = None,
    config: ConfigOpt = None,
) -> None:
    """Fit approach curves: a per-curve table and the run's work-function estimate."""
    from pipeline.io.readers import read_file
    from pipeline.stages.barrier import combine_fit_tables, estimate_work_function, fit_curves
    from pipeline.tasks import curve_fit_options

    try:
        cfg = _load_config(config)
        curves, tables = [], []
        for f in files:
            ds = read_file(f)
            if ds.attrs.get("kind") != "curve":
                raise ProcessingError(f"{f}: holds a frame, not approach curves")
            curves.append(ds)
            tables.append(fit_curves(ds, **curve_fit_options(cfg)))
        table = combine_fit_tables(tables)
        est = estimate_work_function(
            table, outlier_threshold_sigma=cfg.barrier.outlier_threshold_sigma)
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    table = est.updated_table(table)
    t = Table(title="approach-curve fits")
    for col in ("curve", "φ_ap / eV", "± / eV", "range / nm", "points", "used", "reason"):
        t.add_column(col)
    for i in range(table.sizes["curve"]):
        row = table.isel(curve=i)
        ok = bool(row["accepted"].item())
        t.add_row(str(row["curve_id"].item()) if "curve_id" in row else str(i),
                  f"{float(row['phi_ap_eV']):.3f}", f"{float(row['phi_ap_uncertainty_eV']):.3f}",
                  f"{float(row['z_min_m']) * 1e9:.3f}–{float(row['z_max_m']) * 1e9:.3f}",
                  str(int(row["n_points"])), "yes" if ok else "[red]no[/]",
                  str(row["reason"].item()))
    out.print(t)
    out.print(f"run estimate: φ = {est.work_function_eV:.3f} ± "
              f"{est.work_function_uncertainty_eV:.3f} eV from {est.n_curves_used} curve(s)",
              highlight=False)
    if plot is not None:
        from pipeline.report.barrier_plot import plot_approach_curves

        plot_approach_curves(curves, table, est, plot)
        out.print(f"plot written to {plot}", highlight=False)


@app.command()
def report(
    store: Annotated[Path, typer.Argument(help="an isogap store")],
    out_dir: Annotated[Path, typer.Option("--out", "-o", help="folder for the HTML report")],
    overwrite: Annotated[bool, typer.Option("--overwrite",
                                            help="replace an existing report")] = False,
) -> None:
    """Write a static HTML page for the morning review (open index.html in a browser)."""
    from pipeline.report.html import write_report

    try:
        index = write_report(store, out_dir, overwrite=overwrite)
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    out.print(f"report written to {index}", highlight=False)


@app.command()
def export(
    store: Annotated[Path, typer.Argument(help="an isogap store")],
    frames: Annotated[list[str] | None, typer.Argument(help="frame ids (default: all)")] = None,
    to: Annotated[Path, typer.Option("--to", help="output folder")] = Path("export"),
    fmt: Annotated[str, typer.Option("--format", "-f", help="npy, csv, png or tiff")] = "npy",
    overwrite: Annotated[bool, typer.Option("--overwrite",
                                            help="replace existing files")] = False,
) -> None:
    """Export height maps for other tools (pixel size recorded with each file)."""
    from pipeline.io.export import export_frames

    if fmt not in ("npy", "csv", "png", "tiff"):
        raise _fail(f"--format {fmt!r}: expected npy, csv, png or tiff")
    try:
        paths = export_frames(store, to, frame_ids=frames or None, fmt=fmt, overwrite=overwrite)
    except IsogapError as exc:
        raise _fail(str(exc)) from None
    out.print(f"{len(paths)} file(s) written to {to}", highlight=False)


def main() -> None:
    """Console-script entry point."""
    app()


if __name__ == "__main__":  # pragma: no cover
    main()
