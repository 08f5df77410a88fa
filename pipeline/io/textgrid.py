"""Text grids: one 2-D channel per file (``.txt``/``.csv``) with a TOML sidecar (DESIGN.md §3).

The data file holds numbers only: one line per row (row index = y, the slow axis), values
separated by whitespace, or by commas (a file containing any comma is read as comma-separated).
``nan``/``inf`` are numbers here (unrecorded pixels). No header and no comment lines: the
attributes live in the sidecar (``f012.txt`` + ``f012.toml``), which has the global attributes
at its top level plus::

    channel = "current"   # or "z"
    units = "A"           # the channel's units
"""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import xarray as xr

from pipeline.errors import MissingAttributeError, UnreadableFileError
from pipeline.io.npz import read_sidecar, sidecar_path

__all__ = ["TEXTGRID_CHANNELS", "TEXTGRID_READER", "TextGridReader", "parse_grid"]

#: The channels a text grid can hold (DESIGN.md §3).
TEXTGRID_CHANNELS = ("current", "z")


def parse_grid(text: str, *, source: str) -> np.ndarray:
    """Parse a grid of numbers (rows = lines) into a 2-D float64 array.

    Raises
    ------
    UnreadableFileError
        If the text is empty, holds anything but numbers, or its rows differ in length.
    """
    if not text.strip():
        raise UnreadableFileError(f"{source}: text grid contains no numbers")
    delimiter = "," if "," in text else None
    try:
        return np.loadtxt(io.StringIO(text), delimiter=delimiter, comments=None, ndmin=2,
                          dtype=np.float64)
    except ValueError as exc:
        raise UnreadableFileError(
            f"{source}: not a grid of numbers ({exc}); a text grid holds numbers only, one line "
            "per row, separated by whitespace or commas") from None


class TextGridReader:
    """Reader of one-channel text grids with a TOML sidecar."""

    name = "text-grid"
    suffixes = (".txt", ".csv")
    uses_sidecar = True

    def read(self, path: Path) -> xr.Dataset:
        """Read the grid and its sidecar into a one-variable dataset, as found (not validated)."""
        path = Path(path)
        try:
            raw = path.read_bytes()
        except OSError as exc:
            raise UnreadableFileError(f"{path}: cannot read ({exc})") from None
        if b"\x00" in raw:
            raise UnreadableFileError(f"{path}: binary content (NUL bytes); a text grid holds "
                                      "numbers as text")
        try:
            text = raw.decode("utf-8")
        except UnicodeDecodeError:
            raise UnreadableFileError(f"{path}: not UTF-8 text; a text grid holds numbers as "
                                      "text") from None
        attrs, tables = read_sidecar(path)
        side = sidecar_path(path).name
        if tables:
            raise UnreadableFileError(
                f"{path}: sidecar {side} has table(s) "
                f"{', '.join(f'[{t}]' for t in tables)}; a text-grid sidecar has top-level keys "
                "only (global attributes plus 'channel' and 'units')")
        channel = attrs.pop("channel", None)
        if channel is None:
            raise MissingAttributeError(
                f"{path}: sidecar {side}: key 'channel' is missing (expected "
                f"{' or '.join(repr(c) for c in TEXTGRID_CHANNELS)})")
        if channel not in TEXTGRID_CHANNELS:
            raise MissingAttributeError(
                f"{path}: sidecar {side}: channel = {channel!r}; expected "
                f"{' or '.join(repr(c) for c in TEXTGRID_CHANNELS)}")
        var_attrs = {}
        if "units" in attrs:
            var_attrs["units"] = attrs.pop("units")
        grid = parse_grid(text, source=str(path))
        return xr.Dataset({channel: (("y", "x"), grid, var_attrs)}, attrs=attrs)


TEXTGRID_READER = TextGridReader()
