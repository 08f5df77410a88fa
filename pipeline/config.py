"""Configuration schema: one validated table per stage, TOML load/dump, clear errors.

Every key carries its unit in its name. ``configs/default.toml`` is generated from these models
(``isogap config show``) so the documented defaults can never drift from the code;
a test checks that the shipped file equals the generated one.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import os
import tomllib
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError

from pipeline.errors import ConfigError

__all__ = [
    "BarrierConfig",
    "CalibrateConfig",
    "Config",
    "DriftConfig",
    "HeightConfig",
    "InputConfig",
    "LevelConfig",
    "QualityConfig",
    "RunConfig",
    "config_sha256",
    "dump_toml",
    "load_config",
    "parse_config",
    "toml_value",
    "with_run_overrides",
]


class _Section(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True, validate_default=True)


class RunConfig(_Section):
    """How the batch runs."""

    executor: Literal["serial", "processes", "dask"] = Field(
        "processes", description="serial (one core), processes (local cores) or dask (cluster)")
    workers: int = Field(0, ge=0, le=1024, description="worker processes; 0 = all local cores")
    scheduler_address: str = Field(
        "", description="Dask scheduler address (tcp://HOST:PORT) when executor = \"dask\"")
    title: str = Field("isogap run", description="title attribute of the store")


class InputConfig(_Section):
    """Which files of the run folder are read."""

    recursive: bool = Field(False, description="also read files in sub-folders")
    piezo_z_m_per_V: float | None = Field(
        None, gt=0, le=1e-6,
        description="z piezo sensitivity in m/V, overriding the files' own attribute "
        "(unset = use the file's)")


class BarrierConfig(_Section):
    """Work function / decay constant from the run's approach curves."""

    source: Literal["curves", "fixed", "two-setpoint"] = Field(
        "curves", description="curves: fit the run's approach curves (fixed value if none); "
        "fixed: use work_function_eV; two-setpoint: from two frames of one area")
    work_function_eV: float = Field(
        4.5, gt=0.5, le=12.0, description="barrier height used when source = \"fixed\" or a "
        "run has no usable curves, eV")
    work_function_uncertainty_eV: float = Field(
        0.5, ge=0, le=5.0, description="standard uncertainty of work_function_eV, eV")
    min_points: int = Field(8, ge=4, le=100000, description="fewest samples in a usable fit range")
    outlier_threshold_sigma: float = Field(
        3.0, gt=0, le=100, description="curves further than this many standard deviations from "
        "the run's weighted mean are rejected")
    grid_curves_in_estimate: bool = Field(
        False, description="also pool curves recorded on a grid (which make a barrier map) into "
        "the run's work function; by default the map's curves only make the map")
    bias_correction: bool = Field(
        False, description="also fit the numerical WKB model to report a bias-corrected barrier")
    barrier_profile: Literal["trapezoid", "image-force"] = Field(
        "trapezoid", description="barrier shape of that WKB model: trapezoid (bias only) or "
        "image-force (bias and image-force lowering)")
    noise_floor_A: float | None = Field(
        None, ge=0, le=1e-6, description="standard deviation of the additive current noise of "
        "approach curves (unset = estimated from each curve's retracted tail)")
    current_limit_A: float | None = Field(
        None, gt=0, le=1.0, description="preamplifier saturation level of approach curves "
        "(unset = the file's current_limit_A attribute, else detected from clipped samples)")
    floor_threshold_sigma: float = Field(
        5.0, ge=1.0, le=100.0, description="the fit range keeps samples whose fitted current "
        "exceeds this many noise-floor standard deviations")
    tip_change_threshold_sigma: float = Field(
        8.0, gt=0, le=1000, description="a jump or change of slope within a curve that improves "
        "a two-segment fit by more than this many standard deviations rejects it as a tip change")
    reject_contact_curves: bool = Field(
        True, description="reject curves whose closest part levels off below saturation (point "
        "contact); the fit range excludes that part either way")


class HeightConfig(_Section):
    """Current or feedback signal → height."""

    combine_traces: bool = Field(
        True, description="average forward and backward traces where they agree")
    trace_mismatch_sigma: float = Field(
        5.0, gt=0, le=1000, description="flag pixels whose traces differ by more than this many "
        "noise standard deviations")
    noise_floor_A: float | None = Field(
        None, ge=0, le=1e-6, description="currents below this magnitude are flagged "
        "(unset = estimated from the frame)")
    current_noise_A: float | None = Field(
        None, ge=0, le=1e-6, description="standard deviation of the current noise "
        "(unset = estimated from the frame)")


class LevelConfig(_Section):
    """Background removal that keeps step heights true."""

    method: Literal["none", "plane", "polynomial"] = Field(
        "plane", description="background model: none, plane or polynomial")
    polynomial_order: int = Field(2, ge=1, le=8, description="order when method = \"polynomial\"")
    robust: bool = Field(True, description="iteratively reweighted fit (adsorbates, steps)")
    line_offsets: bool = Field(True, description="remove per-line offsets by robust matching")
    line_slopes: bool = Field(False, description="also remove per-line slopes")
    tip_jumps: Literal["remove", "keep"] = Field(
        "remove", description="a persistent height jump between lines at a detected tip change "
        "(the tip got longer or shorter): remove it from the height map, or keep it as a step "
        "(the frame is flagged either way)")
    terraces: bool = Field(True, description="segment terraces; one common plane (the "
                           "polynomial when method = \"polynomial\") plus one offset per "
                           "terrace; report step heights")
    scars: bool = Field(True, description="detect, flag and repair short streaks in one line")
    min_terrace_px: int = Field(
        256, ge=4, le=100_000_000, description="regions between height edges smaller than "
        "this many pixels are not terraces (adsorbates, fragments)")
    min_step_height_m: float = Field(
        5e-11, gt=0, le=1e-8, description="height differences below this are not steps: "
        "neighbouring regions closer in level are one terrace; smaller persistent line jumps "
        "are line offsets, m")
    edge_threshold_sigma: float = Field(
        6.0, gt=0, le=1000, description="terrace edges: smoothed height gradient above the "
        "median by this many robust standard deviations")
    line_step_threshold_sigma: float = Field(
        5.0, gt=0, le=1000, description="a persistent jump between lines is kept as a step "
        "parallel to the fast axis above this many standard deviations of the line-offset noise")
    scar_threshold_sigma: float = Field(
        6.0, gt=0, le=1000, description="scar pixels deviate from the lines above and below "
        "by more than this many robust standard deviations")
    scar_max_length_px: int = Field(
        32, ge=1, le=100_000, description="longest streak along a line repaired as a scar, "
        "pixels")


class DriftConfig(_Section):
    """Thermal drift between and within frames."""

    enabled: bool = Field(True, description="measure and correct drift over the run")
    upsample_factor: int = Field(
        20, ge=1, le=1000, description="registration precision is 1/upsample_factor pixel")
    min_confidence: float = Field(
        0.3, ge=0, le=1, description="frame pairs whose registration confidence is below this "
        "are excluded from the drift model")
    model: Literal["constant", "smooth"] = Field(
        "constant", description="drift velocity model over the run: constant or smooth")
    correct_within_frames: bool = Field(
        True, description="move each pixel back by the drift during its own acquisition")
    smooth_degree: int = Field(
        2, ge=1, le=6, description="polynomial degree of position against time when "
        "model = \"smooth\"")
    outlier_threshold_sigma: float = Field(
        4.0, gt=0, le=100, description="frame pairs further than this many standard deviations "
        "from the drift model are excluded, one at a time")
    interpolation_order: Literal[1, 3] = Field(
        1, description="interpolation of the corrected frames: 1 (linear) or 3 (cubic spline)")
    correction_reference: Literal["run-start", "frame-mid"] = Field(
        "frame-mid", description="frame-mid: undo the drift within each frame (its absolute "
        "displacement is recorded); run-start: also move every frame back to the run start "
        "(after hours of drift most of a frame then lies outside its own grid)")


class CalibrateConfig(_Section):
    """z and lateral scale calibration."""

    known_step_height_m: float | None = Field(
        None, gt=0, le=1e-8, description="true monatomic step height (e.g. a/sqrt(3) for "
        "fcc(111)); when set, z is rescaled so measured steps match it")
    lattice_constant_m: float | None = Field(
        None, gt=0, le=1e-8, description="surface lattice period (nearest-neighbour distance, "
        "e.g. a/sqrt(2) for fcc(111)) for the lateral calibration, m")
    min_lattice_peak_snr: float = Field(
        30.0, gt=1, le=1e12, description="each first-order lattice peak must stand this many "
        "times above the spectral background, else the frame is not atomically resolved")


class QualityConfig(_Section):
    """Flags, roughness and tip-change detection."""

    tip_change_threshold_sigma: float = Field(
        8.0, gt=0, le=1000, description="line-to-line jumps larger than this many robust "
        "standard deviations that persist count as tip changes")
    bad_pixel_fraction_limit: float = Field(
        0.01, ge=0, le=1, description="a frame with a larger fraction of unusable pixels (not "
        "recorded, saturated, below the noise floor, outside) is flagged")
    trace_mismatch_fraction_limit: float = Field(
        0.02, ge=0, le=1, description="a frame whose forward and backward traces disagree on a "
        "larger fraction of pixels is flagged")
    step_disagreement_sigma: float = Field(
        5.0, gt=0, le=1000, description="a frame whose unit step lies further than this many "
        "standard deviations (its own and the run's scatter) and more than 2 % from the step "
        "the run's frames agree on (3 or more frames with steps) is flagged and left out of "
        "the z calibration")


class Config(_Section):
    """The whole effective configuration of a run."""

    run: RunConfig = RunConfig()
    input: InputConfig = InputConfig()
    barrier: BarrierConfig = BarrierConfig()
    height: HeightConfig = HeightConfig()
    level: LevelConfig = LevelConfig()
    drift: DriftConfig = DriftConfig()
    calibrate: CalibrateConfig = CalibrateConfig()
    quality: QualityConfig = QualityConfig()


# --------------------------------------------------------------------------------------------
# loading and errors
# --------------------------------------------------------------------------------------------


def _valid_keys(model: type[BaseModel], path: tuple[str | int, ...]) -> list[str]:
    cls: Any = model
    for part in path:
        field = cls.model_fields.get(part) if isinstance(part, str) else None
        if field is None or not isinstance(field.annotation, type) or not issubclass(
                field.annotation, BaseModel):
            break
        cls = field.annotation
    return list(cls.model_fields)


def _format_error(err: dict[str, Any], source: str) -> str:
    loc = tuple(err["loc"])
    where = ".".join(map(str, loc))
    table = ".".join(map(str, loc[:-1]))
    key = str(loc[-1]) if loc else ""
    if err["type"] == "extra_forbidden":
        valid = _valid_keys(Config, loc[:-1])
        close = difflib.get_close_matches(key, valid, n=1, cutoff=0.5)
        hint = f" (did you mean '{close[0]}'?)" if close else f" (valid: {', '.join(valid)})"
        place = f" in [{table}]" if table else ""
        return f"config {source}: unknown key '{key}'{place}{hint}"
    value = err.get("input")
    return f"config {source}: key '{where}' = {value!r}: {err['msg']}"


def parse_config(data: dict[str, Any], *, source: str = "<config>") -> Config:
    """Validate a config mapping (as read from TOML) and return the effective :class:`Config`."""
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        lines = [_format_error(e, source) for e in exc.errors()]
        raise ConfigError("\n".join(lines)) from None


def load_config(path: str | os.PathLike[str] | None = None) -> Config:
    """Load and validate a TOML config file; ``None`` gives the defaults."""
    if path is None:
        return Config()
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"config {p}: file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"config {p}: cannot read ({exc})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config {p}: not valid TOML ({exc})") from None
    return parse_config(data, source=str(p))


def with_run_overrides(
    config: Config, *, workers: int | None = None, executor: str | None = None,
    scheduler: str | None = None,
) -> Config:
    """A copy of ``config`` with command-line choices of the ``[run]`` table applied.

    A scheduler address implies the Dask executor. The result is validated like a file.
    """
    run = config.run.model_dump()
    if workers is not None:
        run["workers"] = workers
    if executor is not None:
        run["executor"] = executor
    if scheduler:
        run["executor"], run["scheduler_address"] = "dask", scheduler
    data = config.model_dump()
    data["run"] = run
    return parse_config(data, source="command-line options")


# --------------------------------------------------------------------------------------------
# dumping
# --------------------------------------------------------------------------------------------


def toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError(f"cannot write {v} to TOML")
        return repr(v)
    if isinstance(v, str):  # a JSON string literal is a valid TOML basic string
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list | tuple):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    raise TypeError(f"cannot write {type(v).__name__} to TOML")


def dump_toml(config: Config, *, comments: bool = True) -> str:
    """Write a config as TOML, every key (unset optional keys as comments) with its description."""
    out: list[str] = []
    if comments:
        out += ["# isogap configuration: every key, with its default.",
                "# Units are in the key names (m, V, A, s, eV). Unknown keys are errors.", ""]
    for name in Config.model_fields:
        section: BaseModel = getattr(config, name)
        if comments and section.__doc__:
            out.append(f"# {section.__doc__.strip().splitlines()[0]}")
        out.append(f"[{name}]")
        for key, field in type(section).model_fields.items():
            value = getattr(section, key)
            if comments and field.description:
                out.append(f"# {field.description}")
            if value is None:
                out.append(f"# {key} =")
            else:
                out.append(f"{key} = {toml_value(value)}")
        out.append("")
    return "\n".join(out)


def config_sha256(config: Config) -> str:
    """SHA-256 of the canonical (comment-free) TOML of a config."""
    return hashlib.sha256(dump_toml(config, comments=False).encode()).hexdigest()
