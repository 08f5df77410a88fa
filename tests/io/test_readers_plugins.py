"""Reader plug-ins through the ``isogap.readers`` entry-point group (importlib.metadata patched).

Reference: the plug-in's own file content is the check value; SHA-256 against ``hashlib``.
"""

from __future__ import annotations

import hashlib
import importlib.metadata
import json
import re
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import xarray as xr

from pipeline.errors import ConfigError, MissingAttributeError, UnreadableFileError
from pipeline.io import (
    ENTRY_POINT_GROUP,
    clear_reader_registry,
    find_inputs,
    get_readers,
    read_file,
    reader_for,
    register_reader,
)

ATTRS = dict(kind="frame", mode="constant-height", bias_V=-0.3, scan_size_x_m=1e-8,
             scan_size_y_m=1e-8, line_time_s=0.02, start_time="2026-03-15T01:00:00")


class LabReader:
    """A lab's JSON format: {"attrs": {...}, "current": [[...]]} in a .labj file."""

    name = "lab-json"
    suffixes = (".labj", ".LABJ2")

    def read(self, path: Path) -> xr.Dataset:
        doc = json.loads(Path(path).read_text())
        return xr.Dataset({"current": (("y", "x"), np.asarray(doc["current"]), {"units": "pA"})},
                          attrs=doc["attrs"])


class FakeEntryPoint:
    def __init__(self, name: str, target: Any, value: str = "lab_pkg.reader:LabReader") -> None:
        self.name, self.value, self.group = name, value, ENTRY_POINT_GROUP
        self._target = target

    def load(self) -> Any:
        if isinstance(self._target, BaseException):
            raise self._target
        return self._target


@pytest.fixture
def plugins(monkeypatch: pytest.MonkeyPatch) -> Iterator[Callable[..., None]]:
    """Install fake entry points: plugins(FakeEntryPoint(...), ...)."""

    def install(*eps: FakeEntryPoint) -> None:
        def fake(**kw: Any) -> list[FakeEntryPoint]:
            return list(eps) if kw.get("group") == ENTRY_POINT_GROUP else []

        monkeypatch.setattr(importlib.metadata, "entry_points", fake)
        clear_reader_registry()

    clear_reader_registry()
    yield install
    monkeypatch.undo()
    clear_reader_registry()


def lab_file(folder: Path, name: str = "scan01.labj", **attrs: Any) -> Path:
    cur = (-np.arange(1, 13, dtype=float).reshape(3, 4) * 10.0).tolist()  # pA, negative bias
    path = folder / name
    path.write_text(json.dumps({"attrs": {**ATTRS, **attrs}, "current": cur}))
    return path


@pytest.mark.parametrize("as_class", [True, False])
def test_plugin_reads_and_is_validated(tmp_path: Path, plugins: Callable[..., None],
                                       as_class: bool) -> None:
    plugins(FakeEntryPoint("lab", LabReader if as_class else LabReader()))
    path = lab_file(tmp_path)
    assert reader_for(path).name == "lab-json"
    assert reader_for(tmp_path / "x.labj2").name == "lab-json"  # suffixes case-insensitive
    out = read_file(path)
    # pA -> A (SI prefix p = 1e-12)
    np.testing.assert_allclose(out["current"].values,
                               -np.arange(1, 13).reshape(3, 4) * 10.0e-12, rtol=1e-15)
    assert out.attrs["source_sha256"] == hashlib.sha256(path.read_bytes()).hexdigest()
    assert out.attrs["frame_id"] == "scan01"
    assert find_inputs(tmp_path) == [path]


def test_plugin_contract_errors_name_the_file(tmp_path: Path,
                                            plugins: Callable[..., None]) -> None:
    plugins(FakeEntryPoint("lab", LabReader))
    path = lab_file(tmp_path, mode="imaging")
    with pytest.raises(MissingAttributeError,
                       match="^" + re.escape(str(path)) + ".*'mode' = 'imaging'"):
        read_file(path)


def test_plugin_exception_becomes_unreadable(tmp_path: Path,
                                             plugins: Callable[..., None]) -> None:
    plugins(FakeEntryPoint("lab", LabReader))
    path = tmp_path / "bad.labj"
    path.write_text("{not json")
    with pytest.raises(UnreadableFileError,
                       match="^" + re.escape(str(path)) + ": cannot be read by the lab-json "
                       "reader.*JSONDecodeError"):
        read_file(path)
    path.write_text(json.dumps({"attrs": ATTRS}))  # KeyError inside the plug-in
    with pytest.raises(UnreadableFileError, match=r"bad\.labj: cannot be read.*KeyError"):
        read_file(path)


def test_plugin_isogap_error_gets_file_prefix(tmp_path: Path,
                                              plugins: Callable[..., None]) -> None:
    class Strict(LabReader):
        def read(self, path: Path) -> xr.Dataset:
            raise UnreadableFileError("checksum mismatch in block 3")

    plugins(FakeEntryPoint("lab", Strict))
    path = lab_file(tmp_path)
    with pytest.raises(UnreadableFileError,
                       match="^" + re.escape(str(path)) + ": checksum mismatch in block 3$"):
        read_file(path)


def test_plugin_returning_non_dataset(tmp_path: Path, plugins: Callable[..., None]) -> None:
    class Wrong(LabReader):
        def read(self, path: Path) -> Any:
            return {"current": [1, 2]}

    plugins(FakeEntryPoint("lab", Wrong))
    path = lab_file(tmp_path)
    with pytest.raises(UnreadableFileError, match=r"scan01\.labj: the lab-json reader returned "
                                                  "dict, not an xarray.Dataset"):
        read_file(path)


@pytest.mark.parametrize("suffix", [".nc", ".NPZ", ".csv", ".toml"])
def test_plugin_cannot_override_builtin_suffix(tmp_path: Path, plugins: Callable[..., None],
                                               suffix: str) -> None:
    class Greedy(LabReader):
        name = "greedy"
        suffixes = (".labj", suffix)

    plugins(FakeEntryPoint("greedy", Greedy))
    with pytest.raises(ConfigError, match=rf"plug-in 'greedy'.*claims suffix "
                                          rf"'{re.escape(suffix.lower())}'.*(built-in|reserved)"):
        find_inputs(tmp_path)


def test_two_plugins_same_suffix(plugins: Callable[..., None]) -> None:
    class Other(LabReader):
        name = "other-json"

    plugins(FakeEntryPoint("a_lab", LabReader), FakeEntryPoint("b_lab", Other))
    with pytest.raises(ConfigError, match=r"plug-in 'b_lab'.*'other-json' claims suffix "
                                          r"'\.labj', which reader 'lab-json' already handles"):
        get_readers()


@pytest.mark.parametrize(("target", "problem"), [
    (ImportError("No module named 'lab_pkg'"), "cannot be loaded.*ImportError.*lab_pkg"),
    (object(), "reader has no 'name' string"),
    (type("NoSuffix", (), {"name": "x", "suffixes": ("dat",), "read": lambda s, p: None}),
     "needs 'suffixes'"),
    (type("NoRead", (), {"name": "x", "suffixes": (".dat",)}), "has no read"),
])
def test_broken_plugin_is_config_error(plugins: Callable[..., None], target: Any,
                                       problem: str) -> None:
    plugins(FakeEntryPoint("broken", target, value="lab_pkg.reader:Broken"))
    with pytest.raises(ConfigError, match=r"plug-in 'broken' \(lab_pkg.reader:Broken.*" + problem):
        get_readers()


def test_register_reader(tmp_path: Path, plugins: Callable[..., None]) -> None:
    plugins()
    register_reader(LabReader)
    path = lab_file(tmp_path)
    assert read_file(path).sizes == {"y": 3, "x": 4}
    with pytest.raises(ConfigError, match=r"claims suffix '\.labj', which reader 'lab-json'"):
        register_reader(type("Again", (LabReader,), {"name": "again"}))
    clear_reader_registry()
    assert reader_for(path) is None


def test_builtins_without_plugins(plugins: Callable[..., None]) -> None:
    plugins()
    assert sorted(get_readers()) == [".csv", ".h5", ".nc", ".npz", ".txt"]
    assert {r.name for r in get_readers().values()} == {"netcdf4", "npz", "text-grid"}
