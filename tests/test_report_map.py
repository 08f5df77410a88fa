"""The apparent-barrier map plot and its place in the run report."""

from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from pipeline.report.html import write_report
from pipeline.report.map_plot import plot_barrier_map


def test_map_plot_shows_rejected_nodes_and_counts(tmp_path):
    phi = np.full((3, 4), 4.5)
    phi[1, 2] = np.nan
    ds = xr.Dataset({"phi_ap_eV": (("y", "x"), phi),
                     "phi_ap_uncertainty_eV": (("y", "x"), np.full((3, 4), 0.02))},
                    coords={"x": np.arange(4) * 1e-9, "y": np.arange(3) * 1e-9})
    fig = plot_barrier_map(ds, tmp_path / "m.png", name="grid-a")
    assert "11 of 12" in fig._suptitle.get_text()
    assert (tmp_path / "m.png").stat().st_size > 5000


@pytest.mark.slow
def test_report_embeds_the_sample_barrier_map(sample_calibrated, tmp_path):
    store, _, _ = sample_calibrated
    index = write_report(store, tmp_path / "rep")
    html = index.read_text()
    assert "Apparent-barrier map from the curve grid" in html
    assert (tmp_path / "rep" / "img" / "run").is_dir()
    assert any(p.name.startswith("map_") for p in (tmp_path / "rep" / "img" / "run").iterdir())
    assert "x scale factor from the lattice" in html
