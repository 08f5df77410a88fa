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


# --------------------------------------------------------------------------------------------
# from the store alone (curves=None)
# --------------------------------------------------------------------------------------------


def _stored_table(tmp_path, table, est):
    """The fit table as a report finds it: written to a store's run group and read back."""
    from pipeline.io.store import open_store, write_store

    run = table.assign_attrs(est.to_attrs())
    store = write_store(tmp_path / "run.h5", frames=[], run=run, title="curves only")
    return open_store(store).run()


def _left_lines(fig):
    """(solid, dashed) data lines of the left panel, legend proxies and the floor line left out."""
    lines = [ln for ln in fig.axes[0].get_lines() if np.size(ln.get_xdata()) > 2]
    solid = [ln for ln in lines if ln.get_linestyle() == "-"]
    dashed = [ln for ln in lines if ln.get_linestyle() == "--"]
    return solid, dashed


def test_plot_from_the_stored_table_alone(tmp_path) -> None:
    sets, table, est = _run()
    stored = _stored_table(tmp_path, table, est)
    out = tmp_path / "from_store.png"
    fig = plot_approach_curves(None, stored, est, out, dpi=80)
    with Image.open(out) as img:
        assert img.size == (880, 368)  # 11 × 4.6 in at 80 dpi (as with the curves)
    acc = stored["accepted"].values.astype(bool)
    a, b = stored["log_current_at_zero"].values, stored["slope_per_m"].values
    zmin, zmax = stored["z_min_m"].values, stored["z_max_m"].values
    has_fit = np.isfinite(a) & np.isfinite(b)
    assert acc.sum() >= 5 and (~acc & has_fit).sum() >= 2  # the run has both kinds to draw
    solid, dashed = _left_lines(fig)
    # one solid line per accepted curve, one dashed per rejected curve that has a fit
    assert len(solid) == acc.sum() and len(dashed) == (~acc & has_fit).sum()
    for line, k in zip(solid, np.flatnonzero(acc), strict=True):
        zn, mag = line.get_xdata(), line.get_ydata()
        # drawn over the fit range, following the fitted model ln|I| = a + b z (the table's
        # definition, pipeline.stages.barrier.fit_curves), z in nm on the axis
        np.testing.assert_allclose([zn[0], zn[-1]], [zmin[k] * 1e9, zmax[k] * 1e9], rtol=1e-12)
        np.testing.assert_allclose(np.log(mag), a[k] + b[k] * zn * 1e-9, rtol=1e-12)
    assert fig.axes[0].get_yscale() == "log"
    floor = float(np.median(stored["noise_floor_A"].values))
    assert fig.axes[0].get_ylim()[0] == pytest.approx(0.3 * floor)  # as with the curves
    assert "samples not stored" in fig.axes[0].get_title()
    # the right-hand panel is the one drawn with the curves: same points, band and labels
    ref = plot_approach_curves(sets, table, est)
    mine, theirs = fig.axes[1], ref.axes[1]
    assert [t.get_text() for t in mine.texts] == [t.get_text() for t in theirs.texts]
    assert mine.get_ylim() == pytest.approx(theirs.get_ylim())
    for p, q in zip(mine.get_lines(), theirs.get_lines(), strict=True):
        np.testing.assert_array_equal(p.get_ydata(), q.get_ydata())
    assert fig.get_suptitle() == ref.get_suptitle()


def test_plot_from_a_table_without_accepted_curves() -> None:
    ds, _ = simulate_approach_curves(np.random.default_rng(3), n_curves=3, contact_fraction=1.0)
    table = fit_curves(ds)
    assert not table["accepted"].values.any()  # every curve touches the surface (simulator)
    fig = plot_approach_curves(None, table)
    solid, dashed = _left_lines(fig)
    assert len(solid) == 0 and len(dashed) == np.isfinite(table["slope_per_m"].values).sum()
    assert "contact" in " ".join(t.get_text() for t in fig.axes[1].texts)


def test_plot_refuses_a_table_without_the_fit_columns() -> None:
    ds, _ = simulate_approach_curves(np.random.default_rng(3), n_curves=3)
    table = fit_curves(ds).drop_vars(["slope_per_m", "z_max_m"])
    with pytest.raises(ProcessingError, match=r"no slope_per_m, z_max_m column"):
        plot_approach_curves(None, table)
