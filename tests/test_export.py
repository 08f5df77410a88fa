"""Export of height maps to npy / csv / png / tiff (pipeline.io.export)."""

from __future__ import annotations

import json
import sys

import numpy as np
import pytest
import xarray as xr
from PIL import Image

from pipeline.io.export import (
    ExportError,
    OutputExistsError,
    export_frames,
    frame_metadata,
    pixel_size_m,
)
from pipeline.io.store import open_store, write_store
from pipeline.model import Flag, make_height_frame, make_raw_frame

tifffile = pytest.importorskip("tifffile")

# a 64 x 48 pixel frame of 25.6 nm x 14.4 nm: pixels 0.4 nm x 0.3 nm (construction)
NX, NY = 64, 48
SIZE_X, SIZE_Y = 25.6e-9, 14.4e-9
PX, PY = SIZE_X / NX, SIZE_Y / NY


def make_frame(fid: str, seed: int = 0) -> xr.Dataset:
    rng = np.random.default_rng(seed)
    # random heights of ~ 1e-10 m with all float32 mantissa bits in use
    h = rng.normal(0, 1e-10, (NY, NX)) + 2.355e-10 * (np.arange(NX) > NX // 2)
    h[-3:] = np.nan
    flags = np.where(np.isfinite(h), 0, int(Flag.NOT_RECORDED)).astype(np.uint8)
    raw = make_raw_frame(z=np.zeros((NY, NX)), attrs=dict(
        mode="constant-current", bias_V=0.5, setpoint_A=1e-10, scan_size_x_m=SIZE_X,
        scan_size_y_m=SIZE_Y, line_time_s=0.05, start_time="2026-03-14T23:10:00",
        frame_id=fid, source_file=f"/data/{fid}.nc", source_sha256="0" * 64))
    return make_height_frame(raw, h, flags=flags, attrs={"status": "flagged"})


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    path = tmp_path_factory.mktemp("exp") / "s.h5"
    write_store(path, frames=[make_frame("f001", 1), make_frame("f002.b", 2)],
                run=xr.Dataset(), title="export test")
    return path


def stored_height(store, fid):
    return open_store(store).frame(fid)["height"].values


def test_pixel_size_from_coordinates():
    ds = make_frame("a")
    # frame_coords puts pixel centres size/n apart (DESIGN.md frame coordinates)
    assert pixel_size_m(ds) == pytest.approx((PX, PY), rel=1e-12)


def test_npy_round_trip_and_sidecar(store, tmp_path):
    paths = export_frames(store, tmp_path / "npy", fmt="npy")
    names = sorted(p.name for p in paths)
    # a dotted frame id keeps its dot (never treated as a suffix)
    assert names == ["f001.json", "f001.npy", "f002.b.json", "f002.b.npy"]
    for fid in ("f001", "f002.b"):
        arr = np.load(tmp_path / "npy" / f"{fid}.npy", allow_pickle=False)
        ref = stored_height(store, fid)
        assert arr.dtype == np.float32
        np.testing.assert_array_equal(arr, ref)  # float32 exact, NaN where not recorded
        meta = json.loads((tmp_path / "npy" / f"{fid}.json").read_text())
        assert meta["pixel_size_x_m"] == pytest.approx(PX, rel=1e-12)
        assert meta["pixel_size_y_m"] == pytest.approx(PY, rel=1e-12)
        assert meta["units"] == "m"
        assert meta["frame_id"] == fid
        assert meta["source_file"] == f"/data/{fid}.nc"
        assert meta["shape"] == [NY, NX]


def test_csv_round_trip_and_header(store, tmp_path):
    (path,) = export_frames(store, tmp_path, frame_ids=["f001"], fmt="csv")
    text = path.read_text()
    header = [ln for ln in text.splitlines() if ln.startswith("#")]
    sizes = dict(ln[2:].split(" = ") for ln in header if " = " in ln)
    assert float(sizes["pixel_size_x_m"]) == pytest.approx(PX, rel=1e-12)
    assert float(sizes["pixel_size_y_m"]) == pytest.approx(PY, rel=1e-12)
    back = np.loadtxt(path, delimiter=",", comments="#")
    ref = stored_height(store, "f001")
    assert back.shape == ref.shape
    # 9 significant digits reproduce every float32 exactly (IEEE 754 binary32: 9 digits)
    np.testing.assert_array_equal(back.astype(np.float32), ref)


def test_tiff_round_trip_with_pixel_size(store, tmp_path):
    (path,) = export_frames(store, tmp_path, frame_ids=["f002.b"], fmt="tiff")
    assert path.name == "f002.b.tif"
    with tifffile.TiffFile(path) as tif:
        page = tif.pages[0]
        arr = page.asarray()
        assert arr.dtype == np.float32
        np.testing.assert_array_equal(arr, stored_height(store, "f002.b"))
        # resolution tags: pixels per centimetre (TIFF 6.0 ResolutionUnit 3)
        assert int(page.tags["ResolutionUnit"].value) == 3
        num, den = page.tags["XResolution"].value
        assert 0.01 / (num / den) == pytest.approx(PX, rel=1e-9)
        num, den = page.tags["YResolution"].value
        assert 0.01 / (num / den) == pytest.approx(PY, rel=1e-9)
        meta = json.loads(page.description)
    assert meta["pixel_size_x_m"] == pytest.approx(PX, rel=1e-12)
    assert meta["units"] == "m"
    assert meta["frame_id"] == "f002.b"


def test_png_is_the_quicklook(store, tmp_path):
    (path,) = export_frames(store, tmp_path, frame_ids=["f001"], fmt="png")
    with Image.open(path) as im:
        assert im.format == "PNG"
        # quick-look: 6.4 in wide at 110 dpi; 25.6 x 14.4 nm scan: shorter than a square's 814
        assert im.size[0] == 704
        assert 500 < im.size[1] < 814


def test_overwrite_refused_naming_the_file(store, tmp_path):
    export_frames(store, tmp_path, fmt="npy")
    before = (tmp_path / "f001.npy").read_bytes()
    with pytest.raises(OutputExistsError, match=r"f001\.npy already exists"):
        export_frames(store, tmp_path, fmt="npy")
    assert (tmp_path / "f001.npy").read_bytes() == before
    again = export_frames(store, tmp_path, fmt="npy", overwrite=True)
    assert len(again) == 4


def test_refusal_happens_before_any_file_is_written(store, tmp_path):
    (tmp_path / "f002.b.csv").write_text("mine")
    with pytest.raises(OutputExistsError, match=r"f002\.b\.csv"):
        export_frames(store, tmp_path, fmt="csv")
    assert not (tmp_path / "f001.csv").exists()
    assert (tmp_path / "f002.b.csv").read_text() == "mine"


def test_unknown_format_and_frame(store, tmp_path):
    with pytest.raises(ExportError, match="export format 'jpeg' is not known"):
        export_frames(store, tmp_path, fmt="jpeg")  # type: ignore[arg-type]
    with pytest.raises(ExportError, match=r"no frame\(s\) 'nope'.*has: f001, f002\.b"):
        export_frames(store, tmp_path, frame_ids=["nope"])
    assert not any(tmp_path.iterdir())


def test_missing_tifffile_is_a_clear_error(store, tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "tifffile", None)  # import now raises ImportError
    with pytest.raises(ExportError, match=r"pip install 'isogap\[export\]'"):
        export_frames(store, tmp_path, fmt="tiff")
    export_frames(store, tmp_path, fmt="npy")  # the other formats still work


def test_metadata_without_nan_in_json():
    ds = make_frame("m")
    ds.attrs["work_function_eV"] = np.float64("nan")
    meta = frame_metadata(ds)
    assert meta["work_function_eV"] is None
    json.dumps(meta, allow_nan=False)  # strict JSON: other tools must read it
