"""The approach-curve figure: written, sized, and built without pyplot state."""

from __future__ import annotations

import numpy as np
import pytest
from matplotlib.figure import Figure
from PIL import Image

from pipeline.errors import ProcessingError
from pipeline.report.barrier_plot import plot_approach_curves
from pipeline.simulate.curves import simulate_approach_curves
from pipeline.stages.barrier import combine_fit_tables, estimate_work_function, fit_curves


def _run() -> tuple[list, object, object]:
    sets, tables = [], []
    for k in range(2):
        ds, _ = simulate_approach_curves(np.random.default_rng(30 + k), n_curves=5,
                                         contact_fraction=0.2, tip_change_fraction=0.2,
                                         curve_set_id=f"c{k}")
        sets.append(ds)
        tables.append(fit_curves(ds))
    table = combine_fit_tables(tables)
    est = estimate_work_function(table)
    return sets, est.updated_table(table), est


def test_plot_writes_a_png_with_two_panels(tmp_path) -> None:
    sets, table, est = _run()
    out = tmp_path / "plots" / "curves.png"
    fig = plot_approach_curves(sets, table, est, out, dpi=80)
    assert isinstance(fig, Figure)
    assert len(fig.axes) == 2
    assert fig.axes[0].get_yscale() == "log"
    assert f"{est.work_function_eV:.3f}" in fig.get_suptitle()
    texts = " ".join(t.get_text() for t in fig.axes[1].texts)
    assert "contact" in texts and "tip change" in texts  # rejected curves are named
    with Image.open(out) as img:
        assert img.size == (880, 368)  # 11 × 4.6 in at 80 dpi


def test_plot_of_one_set_without_estimate() -> None:
    ds, _ = simulate_approach_curves(np.random.default_rng(3), n_curves=3)
    fig = plot_approach_curves(ds, fit_curves(ds))
    assert fig.get_suptitle() == "approach curves"


def test_plot_refuses_mismatched_table() -> None:
    sets, table, est = _run()
    with pytest.raises(ProcessingError, match=r"5 curve\(s\) but 10 row\(s\)"):
        plot_approach_curves(sets[0], table, est)
