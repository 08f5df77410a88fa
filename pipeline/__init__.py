"""isogap: calibrated height maps from a night of raw STM scans.

The public Python API, for scripts and notebooks::

    import pipeline
    raw = pipeline.load("sample_scans/night-01/frame_001.nc")      # one raw frame or curve set
    summary = pipeline.process("sample_scans/night-01", "night-01.h5")
    store = pipeline.open_store("night-01.h5")
    frame = store.frame(store.frame_ids[0])                       # an xarray.Dataset, SI units

Import package ``pipeline``; command ``isogap``.
"""

from __future__ import annotations

import os
from typing import TYPE_CHECKING, Any

from pipeline._version import __version__

if TYPE_CHECKING:
    import xarray as xr

    from pipeline.batch import RunSummary
    from pipeline.config import Config
    from pipeline.io.store import Store

__all__ = ["Config", "__version__", "load", "load_config", "open_store", "process"]


def load(path: str | os.PathLike[str], *, piezo_z_m_per_V: float | None = None) -> xr.Dataset:
    """Read and validate one raw file (frame or approach curves) as an :class:`xarray.Dataset`."""
    from pipeline.io.readers import read_file

    return read_file(path, piezo_z_m_per_V=piezo_z_m_per_V)


def process(
    run_dir: str | os.PathLike[str],
    store: str | os.PathLike[str],
    config: Config | str | os.PathLike[str] | None = None,
    **kwargs: Any,
) -> RunSummary:
    """Process a run folder into a store, as ``isogap process`` does.

    ``config`` is a :class:`Config`, a TOML file path, or ``None`` for the defaults. Keyword
    arguments go to :func:`pipeline.batch.run_batch` (e.g. ``on_event``).
    """
    from pipeline.batch import run_batch
    from pipeline.config import Config as _Config
    from pipeline.config import load_config as _load

    cfg = config if isinstance(config, _Config) else _load(config)
    return run_batch(run_dir, store, cfg, **kwargs)


def open_store(path: str | os.PathLike[str]) -> Store:
    """Open a finished store; frames come back as :class:`xarray.Dataset` objects."""
    from pipeline.io.store import open_store as _open

    return _open(path)


def load_config(path: str | os.PathLike[str] | None = None) -> Config:
    """Load and validate a TOML config file (``None``: the defaults)."""
    from pipeline.config import load_config as _load

    return _load(path)


def __getattr__(name: str) -> Any:
    if name == "Config":
        from pipeline.config import Config

        return Config
    raise AttributeError(f"module 'pipeline' has no attribute {name!r}")
