"""The HTML report opened in a real (headless) Chromium through Playwright.

Skipped only when /usr/bin/chromium is missing outside CI; in CI (``CI=true``) a missing browser
is a failure.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from urllib.parse import unquote, urlparse

import numpy as np
import pytest
import xarray as xr
from playwright.sync_api import sync_playwright

from pipeline.io.store import Failure, write_store
from pipeline.model import Flag, make_height_frame, make_raw_frame
from pipeline.report import write_report

CHROMIUM = Path("/usr/bin/chromium")
ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
        "--disable-background-networking", "--disable-component-update", "--disable-sync"]
ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"

if not CHROMIUM.exists():
    if os.environ.get("CI") == "true":
        raise RuntimeError(f"{CHROMIUM} is missing but CI=true: the browser test must run in CI")
    pytest.skip(f"{CHROMIUM} not installed (set up Chromium to run the browser test)",
                allow_module_level=True)

N_FRAMES = 6


def make_frame(i: int) -> xr.Dataset:
    n = 96
    rng = np.random.default_rng(i)
    x = (np.arange(n) + 0.5) / n * 40e-9
    X, Y = np.meshgrid(x, x)
    h = 235.5e-12 * np.floor((np.cos(0.3 * i) * X + np.sin(0.3 * i) * Y) / 40e-9 * 2.5 + 1.5)
    for cx, cy in rng.uniform(0, 40e-9, (5, 2)):
        h += 160e-12 * np.exp(-((X - cx) ** 2 + (Y - cy) ** 2) / (2 * 0.9e-9**2))
    h += rng.normal(0, 3e-12, h.shape)
    flags = np.zeros((n, n), np.uint8)
    status, warnings = "ok", []
    if i == 2:
        h[-12:] = np.nan
        flags[-12:] = int(Flag.NOT_RECORDED)
        status = "flagged"
        warnings = ["z: 12.5% of pixels not recorded (NaN/Inf), 12 whole line(s); flagged"]
    raw = make_raw_frame(z=np.zeros((n, n)), attrs=dict(
        mode="constant-current", bias_V=0.6, setpoint_A=1.5e-10, scan_size_x_m=40e-9,
        scan_size_y_m=40e-9, line_time_s=0.08, start_time=f"2026-03-15T01:{10 * i:02d}:00",
        frame_id=f"night_{i:03d}"))
    return make_height_frame(raw, h, flags=flags, attrs={
        "status": status, "warnings": json.dumps(warnings), "step_height_m": 2.35e-10 + i * 1e-13,
        "step_height_uncertainty_m": 1.8e-12, "Sq_m": 9.0e-11, "work_function_eV": 4.81,
        "drift_shift_x_m": 0.21e-9 * i, "drift_shift_y_m": -0.13e-9 * i})


@pytest.fixture(scope="module")
def report_dir(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("browser")
    store = write_store(
        tmp / "night.h5", frames=[make_frame(i) for i in range(N_FRAMES)],
        run=xr.Dataset(attrs={"work_function_eV": 4.81, "work_function_uncertainty_eV": 0.07,
                              "barrier_method": "weighted mean of approach-curve fits",
                              "drift_velocity_x_m_per_s": 8e-12,
                              "drift_velocity_y_m_per_s": -4e-12}),
        failures=[Failure("/runs/night/f_bad.nc", "read",
                          "f_bad.nc: attribute 'bias_V' is missing")],
        title="Au(111) terraces, night of 14–15 March")
    out = tmp / "report"
    write_report(store, out, dpi=80)
    return out


def test_report_in_chromium(report_dir, tmp_path):
    index = report_dir / "index.html"
    problems: list[str] = []
    with sync_playwright() as p:
        context = p.chromium.launch_persistent_context(
            str(tmp_path / "profile"), executable_path=str(CHROMIUM), headless=True, args=ARGS,
            viewport={"width": 1366, "height": 900})
        try:
            page = context.new_page()
            page.on("console", lambda m: problems.append(f"console {m.type}: {m.text}")
                    if m.type in ("error", "warning") else None)
            page.on("pageerror", lambda e: problems.append(f"page error: {e}"))
            page.on("requestfailed", lambda r: problems.append(f"request failed: {r.url}"))
            page.goto(index.as_uri(), wait_until="load")
            rows = page.locator("table.frames tbody tr").count()
            images = page.eval_on_selector_all(
                "table.frames img", "els => els.map(e => [e.complete, e.naturalWidth, e.src])")
            links = page.eval_on_selector_all("a[href]", "els => els.map(e => e.href)")
            ids = page.eval_on_selector_all("[id]", "els => els.map(e => e.id)")
            sticky = page.eval_on_selector(
                "table.frames thead th", "e => getComputedStyle(e).position")
            ARTIFACTS.mkdir(exist_ok=True)
            page.screenshot(path=str(ARTIFACTS / "report.png"), full_page=True)
        finally:
            context.close()
    assert problems == []
    assert rows == N_FRAMES
    assert len(images) == N_FRAMES
    for complete, width, src in images:
        assert complete and width > 0, src
    assert sticky == "sticky"
    for href in links:
        url = urlparse(href)
        assert url.scheme == "file", href  # nothing points to the network
        if url.fragment and unquote(url.path) == str(index):
            assert url.fragment in ids, href
        else:
            assert Path(unquote(url.path)).is_file(), href
    assert (ARTIFACTS / "report.png").stat().st_size > 10_000
