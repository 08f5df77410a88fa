"""The drift figure (pipeline.report.drift_plot) from a synthetic drift table."""

from __future__ import annotations

import json

import numpy as np
import pytest
from matplotlib.figure import Figure

from pipeline.errors import ProcessingError
from pipeline.report.drift_plot import plot_drift
from pipeline.stages.drift import FrameShift, drift_table, fit_drift_series


def table_with_a_rejected_pair():
    t = 65.0 + 130.0 * np.arange(6)
    v = (8e-12, -5e-12)
    ids = [f"f{i:03d}" for i in range(6)]
    shifts = []
    for i in range(5):
        dt = t[i + 1] - t[i]
        conf = 0.05 if i == 2 else 0.9  # one featureless frame pair
        shifts.append(FrameShift(ids[i], ids[i + 1], -v[0] * dt, -v[1] * dt, 2e-12, 2e-12,
                                 conf, dt))
    model = fit_drift_series(t, shifts, frame_ids=ids)
    return drift_table(ids, t, shifts, model)


def test_plot_drift_writes_a_png(tmp_path):
    table = table_with_a_rejected_pair()
    path = tmp_path / "drift.png"
    fig = plot_drift(table, path)
    assert isinstance(fig, Figure)
    assert path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification)
    title = fig._suptitle.get_text()
    # 8e-12 m/s = 0.48 nm/min (1 nm/min = 1e-9 m / 60 s)
    assert "x +0.48" in title and "nm/min" in title and "4 of 5 pairs" in title
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert "pair excluded" in labels
    assert json.loads(table.attrs["drift_warnings"])  # the excluded pair is named


def test_plot_drift_needs_a_drift_table():
    import xarray as xr

    with pytest.raises(ProcessingError, match="no variable"):
        plot_drift(xr.Dataset())
