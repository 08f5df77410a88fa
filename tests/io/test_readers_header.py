"""read_header: the cheap header read agrees with read_file on what the scheduler needs."""

from __future__ import annotations

from pipeline.io.readers import find_inputs, read_file, read_header


def test_header_matches_full_read(tiny_run):
    for path in find_inputs(tiny_run):
        header = read_header(path)
        full = read_file(path)
        assert header is not None, path
        for key in ("kind", "source_file", "source_sha256", "source_stem", "mode", "bias_V"):
            if key in full.attrs:
                assert header[key] == full.attrs[key], (path, key)
        if full.attrs["kind"] == "frame":
            assert header["frame_id"] == full.attrs["frame_id"]


def test_header_of_broken_or_foreign_files_is_none(tmp_path):
    bad = tmp_path / "bad.nc"
    bad.write_bytes(b"not hdf5")
    assert read_header(bad) is None
    orphan = tmp_path / "lonely.npz"
    orphan.write_bytes(b"PK")
    assert read_header(orphan) is None  # no sidecar: read_file will say so
    assert read_header(tmp_path / "x.foo") is None
