"""The static HTML run report (pipeline.report.html.write_report)."""

from __future__ import annotations

import json
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
import xarray as xr

from pipeline.errors import IsogapError, StoreError
from pipeline.io.export import OutputExistsError
from pipeline.io.store import Failure, write_store
from pipeline.model import Flag, make_height_frame, make_raw_frame
from pipeline.report import write_report

EVIL = '<script>alert("x")</script> & done'


def make_frame(fid: str, i: int, *, status: str = "ok", full: bool = True) -> xr.Dataset:
    n = 48
    rng = np.random.default_rng(i)
    x = np.arange(n)
    h = 235e-12 * (x[None, :] + x[:, None] > n) + rng.normal(0, 2e-12, (n, n))
    flags = np.zeros((n, n), np.uint8)
    if status == "flagged":
        h[-6:] = np.nan
        flags[-6:] = int(Flag.NOT_RECORDED)
    raw = make_raw_frame(z=np.zeros((n, n)), attrs=dict(
        mode="constant-height" if i % 2 else "constant-current", bias_V=0.8,
        setpoint_A=2e-10, scan_size_x_m=30e-9, scan_size_y_m=30e-9, line_time_s=0.1,
        start_time=f"2026-03-15T0{i}:00:00", frame_id=fid))
    attrs: dict = {"status": status}
    if full:
        attrs.update(step_height_m=2.351e-10, step_height_uncertainty_m=2.2e-12, Sq_m=41.7e-12,
                     drift_shift_x_m=1.25e-9, drift_shift_y_m=-0.5e-9, work_function_eV=4.73)
    if status == "flagged":
        attrs["warnings"] = json.dumps(["z: 12.5% of pixels not recorded", EVIL])
    return make_height_frame(raw, h, flags=flags, attrs=attrs)


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("rep") / "night.h5"
    f004 = make_frame("f004", 4)
    f004.attrs.update(drift_displacement_x_m=3.1e-9, drift_displacement_y_m=-2.0e-9)
    frames = [make_frame("f003", 3), make_frame("f001", 1, status="flagged"),
              make_frame("f002", 2, full=False), f004]
    run = xr.Dataset(attrs={"work_function_eV": 4.73, "work_function_uncertainty_eV": 0.061,
                            "barrier_method": "weighted mean of approach-curve fits",
                            "drift_velocity_x_m_per_s": 1.0e-11,
                            "drift_velocity_y_m_per_s": -5.0e-12,
                            "drift_velocity_uncertainty_x_m_per_s": 1.0e-12,
                            "drift_model": "constant", "drift_pairs_used": 3,
                            "drift_pairs_rejected": 1, "step_consensus_m": 2.3546e-10,
                            "step_consensus_scatter_m": 7.5e-14,
                            "drift_warnings": json.dumps(["pair f001 → f002 <low> confidence"]),
                            "config_toml": '[run]\ntitle = "a <b>"\n'})
    failures = [Failure("/night/f009.nc", "read", f"f009.nc: broken {EVIL}"),
                Failure("/night/c002.npz", "barrier", "c002.npz: curve 0 is entirely NaN/Inf")]
    write_store(path, frames=frames, run=run, failures=failures, title="Night of <15 March>")
    return path


class PageParser(HTMLParser):
    """Collects links, images, frame rows and text of the report."""

    def __init__(self) -> None:
        super().__init__()
        self.links: list[str] = []
        self.images: list[str] = []
        self.rows: list[dict[str, str]] = []
        self.tags: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag == "a" and "href" in a:
            self.links.append(a["href"])
        if tag == "img":
            self.images.append(a["src"])
        if tag == "tr" and "data-frame" in a:
            self.rows.append(a)
        if tag == "link" and a.get("href"):
            self.links.append(a["href"])
        if tag == "script" and a.get("src"):
            self.links.append(a["src"])

    def handle_data(self, data):
        self.text.append(data)


@pytest.fixture(scope="module")
def report(store, tmp_path_factory):
    out = tmp_path_factory.mktemp("out") / "report"
    index = write_report(store, out)
    page = index.read_text(encoding="utf-8")
    parser = PageParser()
    parser.feed(page)
    return out, page, parser


def test_one_row_per_frame_in_time_order(report):
    _, _, p = report
    assert [r["data-frame"] for r in p.rows] == ["f001", "f002", "f003", "f004"]
    assert [r["data-status"] for r in p.rows] == ["flagged", "ok", "ok", "ok"]


def test_links_and_images_resolve_to_files(report):
    out, _, p = report
    local = [h for h in p.links + p.images if not h.startswith("#")]
    assert len(p.images) == 4  # one thumbnail per frame (no run plots: no tables in the run)
    for ref in local:
        assert "://" not in ref and not ref.startswith("/")  # relative, no network
        assert (out / ref).is_file(), ref
    fulls = {h for h in p.links if h.startswith("img/full/")}
    assert fulls == {f"img/full/f00{i}.png" for i in (1, 2, 3, 4)}
    for anchor in (h[1:] for h in p.links if h.startswith("#")):
        assert f'id="{anchor}"' in report[1]


def test_page_is_self_contained(report):
    _, page, p = report
    assert "script" not in p.tags  # no scripts at all
    assert "link" not in p.tags  # no external style sheets
    assert "http://" not in page and "https://" not in page
    assert "@import" not in page and "url(" not in page


def test_data_is_escaped(report):
    _, page, p = report
    assert "<script>" not in page
    assert "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; done" in page
    assert "Night of &lt;15 March&gt;" in page
    text = "".join(p.text)
    assert EVIL in text  # the warning and failure are shown, as text
    assert 'title = "a <b>"' in text  # the config, escaped on the page, readable as text


def test_header_counts_and_failures(report):
    _, _, p = report
    text = " ".join(" ".join(p.text).split())
    assert "4 frames" in text
    assert "✓ 3 ok" in text
    assert "⚠ 1 flagged" in text
    assert "✗ 2 failed" in text
    assert "/night/f009.nc" in text
    assert "c002.npz: curve 0 is entirely NaN/Inf" in text


def test_values_in_display_units(report):
    _, _page, p = report
    text = " ".join(" ".join(p.text).split())
    # 2.351e-10 ± 2.2e-12 m -> pm with the uncertainty's precision (2 digits, lead digit 2)
    assert "235.1 ± 2.2 pm" in text
    assert "41.7 pm" in text  # Sq
    assert "x +1.25 nm y −0.50 nm" in text  # drift shift (two lines in the cell)
    assert "x +3.10 nm y −2.00 nm" in text  # the displacement since the start comes first
    assert "4.73 eV" in text
    assert "4.73 ± 0.06 eV" in text  # run work function (0.061: one significant digit)
    # 1e-11 m/s = 0.6 nm/min, -5e-12 m/s = -0.3 nm/min, 1e-12 m/s = 0.06 nm/min (conversion)
    assert "x +0.60 ± 0.06, y −0.3 nm/min" in text
    assert "constant, 3 frame pair(s) used, 1 rejected" in text
    assert "235.5 pm (frames scatter 0.1 pm)" in text  # the run's unit step, m -> pm
    assert "drift: pair f001 → f002 <low> confidence" in text  # escaped on the page


def test_missing_attributes_render_as_dash(report):
    _, page, _ = report
    start = page.index('data-frame="f002"')
    row = page[start:page.index("</tr>", start)]
    cells = row.split('<td class="num">')[1:]
    assert [c.split("</td>")[0] for c in cells] == ["—", "—", "—", "—"]


@pytest.fixture(scope="module")
def one_frame_store(tmp_path_factory) -> Path:
    path = tmp_path_factory.mktemp("one") / "one.h5"
    write_store(path, frames=[make_frame("f001", 1)], run=xr.Dataset(), title="one")
    return path


def test_refuses_non_empty_folder_and_overwrites_only_its_own_files(one_frame_store, tmp_path):
    out = tmp_path / "r"
    out.mkdir()
    (out / "notes.txt").write_text("keep me")
    with pytest.raises(OutputExistsError, match=r"report folder .*r is not empty; pass "
                       r"overwrite=True"):
        write_report(one_frame_store, out)
    assert not (out / "index.html").exists()
    assert issubclass(OutputExistsError, IsogapError)
    write_report(one_frame_store, out, overwrite=True, dpi=30)
    assert (out / "index.html").is_file()
    stale = out / "img" / "full" / "gone.png"  # an image of a frame no longer in the store
    stale.write_bytes(b"old")
    write_report(one_frame_store, out, overwrite=True, dpi=30)
    assert not stale.exists()
    assert (out / "img" / "full" / "f001.png").is_file()
    assert (out / "notes.txt").read_text() == "keep me"  # not the report's: left alone


def test_empty_store_and_missing_store(tmp_path):
    empty = tmp_path / "empty.h5"
    write_store(empty, frames=[], run=xr.Dataset(), title="nothing")
    page = write_report(empty, tmp_path / "r").read_text()
    assert "The store holds no frames." in page
    assert "No input failed." in page
    with pytest.raises(StoreError, match="file not found"):
        write_report(tmp_path / "nope.h5", tmp_path / "r2")


def test_out_dir_that_is_a_file(store, tmp_path):
    f = tmp_path / "file"
    f.write_text("x")
    with pytest.raises(IsogapError, match="exists and is not a folder"):
        write_report(store, f)


def test_report_of_a_processed_run(tiny_store, tmp_path):
    """End to end: the simulated tiny run through the batch, then the report."""
    from pipeline.io.store import open_store

    store, _summary = tiny_store
    st = open_store(store)
    run = st.run()
    index = write_report(store, tmp_path / "r", dpi=40)
    page = index.read_text(encoding="utf-8")
    parser = PageParser()
    parser.feed(page)
    assert [r["data-frame"] for r in parser.rows] == sorted(
        st.frame_ids, key=lambda f: (str(st.frame(f).attrs["start_time"]), f))
    for ref in parser.links + parser.images:
        if not ref.startswith("#"):
            assert (tmp_path / "r" / ref).is_file(), ref
    # the run-level plots appear exactly when the run group holds their tables
    has_curves = "curve" in run.dims and run.sizes["curve"] > 0
    has_drift = any(str(v).startswith("drift_") for v in run.data_vars)
    assert ("img/run/approach_curves.png" in parser.images) == has_curves
    assert ("img/run/drift.png" in parser.images) == has_drift


def test_curve_plot_without_source_files_or_fit_columns(tmp_path):
    """Without the raw curves the fits come from the table; without fit columns, no plot."""
    pytest.importorskip("pipeline.report.barrier_plot")
    run = xr.Dataset(
        {"source_file": (("curve",), np.array(["/gone/curves_000.nc"] * 2)),
         "accepted": (("curve",), np.array([1, 1], np.uint8)),
         "phi_ap_eV": (("curve",), np.array([4.5, 4.6]))},
        attrs={"work_function_eV": 4.55, "work_function_uncertainty_eV": 0.05,
               "barrier_method": "approach-curves"})
    store = write_store(tmp_path / "s.h5", frames=[], run=run, title="curves only")
    page = write_report(store, tmp_path / "r").read_text()
    assert "2 fitted, 2 used" in page
    assert "fits drawn from the stored table only (source file /gone/curves_000.nc is not at " \
           "its recorded place" in page
    assert "plot not drawn" in page and "log_current_at_zero" in page  # names missing columns
    assert "<img" not in page


def test_frame_that_cannot_be_drawn_keeps_its_row(tmp_path):
    raw = make_raw_frame(z=np.zeros((8, 8)), attrs={"mode": "constant-current",
                                                    "frame_id": "nosize",
                                                    "start_time": "2026-03-15T00:00:00"})
    ds = make_height_frame(raw, np.zeros((8, 8)), attrs={"status": "ok"})
    store = write_store(tmp_path / "s.h5", frames=[ds], run=xr.Dataset(), title="t")
    page = write_report(store, tmp_path / "r").read_text()
    parser = PageParser()
    parser.feed(page)
    assert [r["data-frame"] for r in parser.rows] == ["nosize"]
    assert parser.images == []
    assert "no image: frame nosize: no x/y coordinates" in page
