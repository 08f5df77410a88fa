"""Writers: atomic replacement, returned paths, sidecar text, exact round trips.

References: TOML v1.0.0 (basic-string escapes, nan/inf floats) read back by the standard
library's ``tomllib``; the values written are the check values.
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from pipeline.io import (
    find_inputs,
    read_file,
    write_netcdf,
    write_raw_netcdf,
    write_raw_npz,
    write_raw_textgrid,
)
from pipeline.io.npz import format_sidecar
from pipeline.model import make_raw_frame

ATTRS = dict(mode="constant-height", bias_V=0.25, scan_size_x_m=1e-8, scan_size_y_m=2e-8,
             line_time_s=0.04, start_time="2026-03-14T23:59:59.250")


def frame(seed: int = 0) -> xr.Dataset:
    cur = 1e-10 * np.exp(np.random.default_rng(seed).normal(size=(4, 6)))
    return make_raw_frame(current=cur, attrs=ATTRS)


def listing(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir())


def test_paths_returned_and_no_temporaries(tmp_path: Path) -> None:
    ds = frame()
    assert write_raw_netcdf(ds, tmp_path / "a.nc") == tmp_path / "a.nc"
    assert write_raw_npz(ds, tmp_path / "b.npz") == (tmp_path / "b.npz", tmp_path / "b.toml")
    assert write_raw_textgrid(ds, tmp_path / "c.csv", channel="current") == (
        tmp_path / "c.csv", tmp_path / "c.toml")
    assert write_netcdf(ds, tmp_path / "sub" / "d.nc") == tmp_path / "sub" / "d.nc"
    assert listing(tmp_path) == ["a.nc", "b.npz", "b.toml", "c.csv", "c.toml", "sub"]


def test_overwrite_replaces_atomically(tmp_path: Path) -> None:
    path = tmp_path / "a.nc"
    write_raw_netcdf(frame(1), path)
    inode = path.stat().st_ino
    write_raw_netcdf(frame(2), path)
    assert path.stat().st_ino != inode  # a new file renamed over the old one, not rewritten
    np.testing.assert_array_equal(read_file(path)["current"].values, frame(2)["current"].values)


def test_failed_write_leaves_nothing(tmp_path: Path) -> None:
    ds = frame().assign_attrs(bad={"nested": 1})  # not a netCDF attribute value
    with pytest.raises(TypeError, match="bad"):
        write_raw_netcdf(ds, tmp_path / "a.nc")
    with pytest.raises(TypeError, match="attribute bad: cannot write dict"):
        write_raw_npz(ds, tmp_path / "b.npz")
    assert listing(tmp_path) == []


def test_failed_write_keeps_previous_file(tmp_path: Path) -> None:
    path = tmp_path / "a.nc"
    write_raw_netcdf(frame(1), path)
    before = path.read_bytes()
    with pytest.raises(TypeError):
        write_raw_netcdf(frame(2).assign_attrs(bad={"x": 1}), path)
    assert path.read_bytes() == before
    assert listing(tmp_path) == ["a.nc"]


def test_temporary_name_is_hidden_from_find_inputs(tmp_path: Path) -> None:
    """A half-written file has a hidden name, which find_inputs skips."""
    (tmp_path / ".a.nc.0123456789ab.tmp").write_bytes(b"\x89HDF\r\n\x1a\n")
    assert find_inputs(tmp_path) == []


def test_sidecar_text_reads_back_exactly() -> None:
    attrs = {"kind": "frame", "bias_V": 0.1 + 0.2, "n": np.int64(-7), "tiny": np.float32(1e-30),
             "flag": True, "angles": np.array([0.5, -1.25]), "names": ["a", "b"],
             "weird key": "x", "text": 'tab\there "quoted" back\\slash\nnewline \x7f é',
             "limit": float("nan"), "big": float("-inf")}
    doc = tomllib.loads(format_sidecar(attrs, {"z": {"units": "m"}, "empty": {}}))
    assert doc["bias_V"] == 0.1 + 0.2  # repr precision: exact (TOML float = IEEE 754 binary64)
    assert doc["n"] == -7 and doc["flag"] is True
    assert doc["tiny"] == float(np.float32(1e-30))
    assert doc["angles"] == [0.5, -1.25] and doc["names"] == ["a", "b"]
    assert doc["weird key"] == "x"
    assert doc["text"] == attrs["text"]
    assert math.isnan(doc["limit"]) and doc["big"] == -math.inf
    assert doc["z"] == {"units": "m"} and "empty" not in doc


def test_sidecar_refuses_2d_array() -> None:
    with pytest.raises(TypeError, match="attribute m: cannot write a 2-D array"):
        format_sidecar({"m": np.eye(2)})


def test_npz_attrs_round_trip_types(tmp_path: Path) -> None:
    ds = frame().assign_attrs(flag=True, angles=np.array([1.0, 2.0]), names=["p", "q"],
                              note="line1\nline2")
    out = read_file(write_raw_npz(ds, tmp_path / "f.npz")[0])
    assert out.attrs["flag"] == 1  # booleans become 0/1 (netCDF has no boolean attribute)
    np.testing.assert_array_equal(out.attrs["angles"], [1.0, 2.0])
    assert out.attrs["names"] == ["p", "q"] and out.attrs["note"] == "line1\nline2"
    out = read_file(write_raw_netcdf(ds, tmp_path / "f.nc"))
    assert out.attrs["flag"] == 1 and out.attrs["names"] == ["p", "q"]


def test_textgrid_precision_and_delimiters(tmp_path: Path) -> None:
    cur = np.array([[0.1 + 0.2, 1 / 3, np.nan], [5e-324, 1.7976931348623157e308, -np.inf]])
    ds = xr.Dataset({"current": (("y", "x"), cur, {"units": "A"})}, attrs=ATTRS)
    csv, _ = write_raw_textgrid(ds, tmp_path / "g.csv", channel="current")
    txt, side = write_raw_textgrid(ds, tmp_path / "g.txt", channel="current")
    assert csv.read_text().splitlines()[0].count(",") == 2
    assert "," not in txt.read_text()
    doc = tomllib.loads(side.read_text())
    assert doc["channel"] == "current" and doc["units"] == "A" and doc["bias_V"] == 0.25
    for path in (csv, txt):
        back = np.loadtxt(path, delimiter="," if path.suffix == ".csv" else None, ndmin=2)
        # %.17g round-trips every float64 (IEEE 754-2019 §5.12.2), subnormals and extremes too
        np.testing.assert_array_equal(back, cur)


def test_textgrid_bad_channel(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="channel = 'height'"):
        write_raw_textgrid(frame(), tmp_path / "g.txt", channel="height")
    assert listing(tmp_path) == []


def test_write_netcdf_generic_and_compressed(tmp_path: Path) -> None:
    truth = xr.Dataset({"height": (("y", "x"), np.arange(12.0).reshape(3, 4) * 1e-10,
                                   {"units": "m"}),
                        "labels": (("y", "x"), np.arange(12, dtype=np.int16).reshape(3, 4))},
                       coords={"x": np.arange(4.0), "y": np.arange(3.0)},
                       attrs={"title": "ground truth", "done": True})
    for compress in (False, True):
        path = write_netcdf(truth, tmp_path / f"t{compress}.nc", compress=compress)
        with xr.open_dataset(path, engine="h5netcdf") as back:
            xr.testing.assert_identical(back.load(), truth.assign_attrs(done=1))
            zlib = back["height"].encoding.get("zlib", False)
            assert zlib is compress
    assert truth.attrs["done"] is True  # the input dataset is not modified

