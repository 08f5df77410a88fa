"""Property-based checks of the readers (hypothesis).

1. Any valid frame or curve set round-trips exactly through every writer and ``read_file``
   (reference: the arrays and attributes written; the validator's own normalisation).
2. Garbage bytes never escape as anything but the project's input errors: for the binary
   containers always ``UnreadableFileError``, whatever the leading signature
   (HDF5 File Format Specification; PKWARE APPNOTE; NetCDF classic format; NEP 1).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pytest
import xarray as xr
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from pipeline.errors import InputError, UnreadableFileError
from pipeline.io import read_file, write_raw_netcdf, write_raw_npz, write_raw_textgrid
from pipeline.model import make_curves, make_raw_frame, validate_curves, validate_raw_frame

SETTINGS = settings(max_examples=40, deadline=None,
                    suppress_health_check=[HealthCheck.function_scoped_fixture])

text_attr = st.text(alphabet=st.characters(blacklist_categories=("Cs",),
                                           blacklist_characters="\x00"), max_size=30)
positive = st.floats(1e-10, 1e-5)
times = st.datetimes().map(lambda t: t.isoformat())


def _shape(draw: st.DrawFn) -> tuple[int, int]:
    return draw(st.integers(2, 7)), draw(st.integers(2, 7))


@st.composite
def frames(draw: st.DrawFn) -> xr.Dataset:
    ny, nx = _shape(draw)
    bias = draw(st.floats(0.001, 5.0)) * draw(st.sampled_from([-1.0, 1.0]))
    mode = draw(st.sampled_from(["constant-current", "constant-height"]))
    mag = hnp.arrays(np.float64, (ny, nx), elements=st.floats(1e-13, 1e-7))
    current = np.sign(bias) * draw(mag)
    z = draw(hnp.arrays(np.float64, (ny, nx), elements=st.floats(-1e-8, 1e-8)))
    if not np.any(z):
        z[0, 0] = 1e-10
    attrs = dict(mode=mode, bias_V=bias, scan_size_x_m=draw(positive),
                 scan_size_y_m=draw(positive), line_time_s=draw(st.floats(1e-4, 10.0)),
                 start_time=draw(times), note=draw(text_attr),
                 scan_angle_deg=draw(st.floats(-180, 180)),
                 n_averages=draw(st.integers(-2**40, 2**40)))
    if mode == "constant-current":
        attrs["setpoint_A"] = float(np.sign(bias)) * draw(st.floats(1e-12, 1e-8))
        return make_raw_frame(z=z, current=current if draw(st.booleans()) else None,
                              attrs=attrs)
    return make_raw_frame(current=current, attrs=attrs)


def _provenance(ds: xr.Dataset, path: Path) -> xr.Dataset:
    out = ds.assign_attrs(source_file=str(path.absolute()), source_stem=path.stem,
                          source_sha256=hashlib.sha256(path.read_bytes()).hexdigest())
    side = path.with_suffix(".toml")
    if side.is_file():
        out.attrs["source_sidecar_sha256"] = hashlib.sha256(side.read_bytes()).hexdigest()
    return out


@pytest.mark.parametrize("fmt", ["nc", "npz", "csv"])
@SETTINGS
@given(ds=frames())
def test_frame_round_trip(tmp_path: Path, fmt: str, ds: xr.Dataset) -> None:
    path = tmp_path / f"frame.{fmt}"
    if fmt == "nc":
        write_raw_netcdf(ds, path)
    elif fmt == "npz":
        write_raw_npz(ds, path)
    else:
        channel = "z" if "z" in ds else "current"
        ds = ds[[channel]]
        write_raw_textgrid(ds, path, channel=channel)
    out = read_file(path)
    ref = validate_raw_frame(_provenance(ds, path).assign_attrs(frame_id=path.stem),
                             source=str(path))
    xr.testing.assert_identical(out, ref)


@pytest.mark.parametrize("fmt", ["nc", "npz"])
@SETTINGS
@given(data=st.data())
def test_curves_round_trip(tmp_path: Path, fmt: str, data: st.DataObject) -> None:
    n_curves, n = data.draw(st.integers(1, 4)), data.draw(st.integers(5, 30))
    bias = data.draw(st.floats(0.001, 5.0)) * data.draw(st.sampled_from([-1.0, 1.0]))
    z = data.draw(hnp.arrays(np.float64, (n_curves, n), elements=st.floats(-1e-9, 1e-9)))
    cur = np.sign(bias) * data.draw(hnp.arrays(np.float64, (n_curves, n),
                                               elements=st.floats(1e-13, 1e-7)))
    ds = make_curves(z, cur, attrs=dict(bias_V=bias, start_time=data.draw(times),
                                        position_x_m=data.draw(st.floats(-1e-6, 1e-6))))
    path = tmp_path / f"curves.{fmt}"
    (write_raw_netcdf if fmt == "nc" else write_raw_npz)(ds, path)
    xr.testing.assert_identical(read_file(path),
                                validate_curves(_provenance(ds, path), source=str(path)))


SIGNATURES = [b"", b"\x89HDF\r\n\x1a\n", b"PK\x03\x04", b"PK\x05\x06", b"CDF\x01",
              b"\x93NUMPY"]
SIDECAR = ('kind = "frame"\nmode = "constant-height"\nbias_V = 0.5\nscan_size_x_m = 1e-8\n'
           'scan_size_y_m = 1e-8\nline_time_s = 0.1\nstart_time = "2026-03-14T22:05:11"\n')


@SETTINGS
@given(suffix=st.sampled_from([".nc", ".h5", ".npz"]), head=st.sampled_from(SIGNATURES),
       body=st.binary(max_size=3000))
def test_garbage_binary_is_unreadable(tmp_path: Path, suffix: str, head: bytes,
                                      body: bytes) -> None:
    path = tmp_path / f"junk{suffix}"
    path.write_bytes(head + body)
    (tmp_path / "junk.toml").write_text(SIDECAR + '[current]\nunits = "A"\n')
    with pytest.raises(UnreadableFileError, match=r"junk\.(nc|h5|npz): "):
        read_file(path)


@SETTINGS
@given(suffix=st.sampled_from([".txt", ".csv"]),
       body=st.one_of(st.binary(max_size=500),
                      st.text(alphabet="0123456789.,-+eE naif\n\t", max_size=300)
                      .map(str.encode)))
def test_garbage_text_is_an_input_error_or_a_grid(tmp_path: Path, suffix: str,
                                                  body: bytes) -> None:
    path = tmp_path / f"junk{suffix}"
    path.write_bytes(body)
    (tmp_path / "junk.toml").write_text(SIDECAR + 'channel = "current"\nunits = "A"\n')
    try:
        out = read_file(path)
    except InputError as exc:
        assert str(exc).startswith(str(path.absolute()))
    else:
        assert out["current"].ndim == 2 and min(out["current"].shape) >= 2
