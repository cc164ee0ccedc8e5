"""Unit tests of the random-walk engine (sheetview.measures.diffusion): repeatability,
independence from the thread count, uniform equilibrium across classes of different
diffusivity, options, memory estimate, result forms and figures."""
import json

import numba
import numpy as np
import pytest

from sheetview import figures

from sheetview.errors import MemoryLimitError, OptionError
from sheetview.grid import GEL, INTERLAYER, SOLID, PhaseGrid
from sheetview.measures import diffusion as dm


def _two_class_grid(periodic=True):
    lab = np.full((8, 8, 20), SOLID, np.uint8)
    lab[:, :, 0:6] = INTERLAYER
    lab[:, :, 6:18] = GEL          # touching: water moves between the classes
    return PhaseGrid(lab, 0.2, periodic=periodic)


def test_same_seed_same_result_whatever_the_threads():
    """Each walker has its own random stream: 1 thread and 2 threads give identical
    decays, exchange and MSD for the same seed; another seed differs."""
    g = _two_class_grid()
    kw = dict(n_walkers=3000, seed=4, rho2_nm_per_us=50.0, t_max_us=0.02, invert=False,
              compare_fast=False)
    n0 = numba.get_num_threads()
    try:
        numba.set_num_threads(1)
        a = dm.relaxation_walk(g, **kw)
        ta = dm.transport_walk(g, n_walkers=2000, seed=1, t_max_us=0.01)
        numba.set_num_threads(min(2, numba.config.NUMBA_NUM_THREADS))
        b = dm.relaxation_walk(g, **kw)
        tb = dm.transport_walk(g, n_walkers=2000, seed=1, t_max_us=0.01)
    finally:
        numba.set_num_threads(n0)
    assert np.array_equal(a.m, b.m)
    assert np.array_equal(a.exchange.fraction, b.exchange.fraction)
    assert np.array_equal(ta.msd_nm2, tb.msd_nm2)
    c = dm.relaxation_walk(g, **{**kw, "seed": 5})
    assert not np.array_equal(a.m, c.m)


def test_uniform_density_kept_across_classes_of_different_diffusivity():
    """Detailed balance of the interface rule: with the interlayer 20 times slower than the
    gel, the share of walkers in each class stays at its volume fraction (no accumulation
    in the slow class), within 4 binomial standard errors, while they do exchange."""
    g = _two_class_grid()
    ex = dm.exchange_fractions(g, t_max_us=0.01, n_walkers=10000, seed=3,
                               diffusivity_nm2_per_us={"interlayer": dm.D_BULK_WATER_NM2_PER_US
                                                       / 20})
    vol = np.array([6, 12]) / 18.0
    i, j = ex.classes.index("interlayer"), ex.classes.index("gel")
    share_il = ex.start_fraction[i] * ex.fraction[-1, i, i] + \
        ex.start_fraction[j] * ex.fraction[-1, j, i]
    se = np.sqrt(vol[0] * (1 - vol[0]) / 10000)
    assert abs(share_il - vol[0]) < 4 * se
    assert ex.fraction[-1, i, j] > 0.1          # they did move between the classes


def test_classes_and_notes():
    g = _two_class_grid()
    r = dm.relaxation_walk(g, n_walkers=500, t_max_us=0.001, invert=False,
                           compare_fast=False)
    assert r.exchange.classes == ["interlayer", "gel"]
    assert any("interlayer water diffuses at the bulk" in n for n in r.notes)
    assert any("not measurements" in n for n in r.notes)
    assert set(r.m_by_class) == {"interlayer", "gel"}
    np.testing.assert_allclose(sum(r.m_by_class.values()), r.m, rtol=1e-12)


def test_results_serialise_and_tabulate():
    g = _two_class_grid()
    r = dm.relaxation_walk(g, n_walkers=1000, seed=1, rho2_nm_per_us=200.0, t_max_us=0.05)
    d = json.loads(json.dumps(r.to_dict()))
    assert d["n_walkers"] == 1000 and "comparison_with_fast_diffusion" in d
    for name, tab in r.tables().items():
        lens = {len(v) for v in tab.values()}
        assert len(lens) == 1, name
    assert "fast_diffusion_fraction" in r.spectrum_table()
    assert "µs" in repr(r) and len(repr(r)) < 200
    t = dm.transport_walk(g, n_walkers=500, t_max_us=0.005)
    json.dumps(t.to_dict())
    assert {len(v) for v in t.table().values()} == {t.t_us.size}
    assert t.tortuosity.shape == (3,)


def test_progress_is_called():
    g = _two_class_grid()
    calls = []
    dm.relaxation_walk(g, n_walkers=200, t_max_us=0.002, invert=False, compare_fast=False,
                       progress=lambda f, msg: calls.append((f, msg)))
    assert calls and all(0 <= f <= 1 for f, _ in calls)
    assert all(isinstance(m, str) for _, m in calls)


def test_options_are_checked():
    g = _two_class_grid()
    with pytest.raises(OptionError, match="n_walkers"):
        dm.relaxation_walk(g, n_walkers=0)
    with pytest.raises(OptionError, match="diffusivity"):
        dm.relaxation_walk(g, diffusivity_nm2_per_us={"capillary": 1.0})
    with pytest.raises(OptionError, match="step_fraction"):
        dm.relaxation_walk(g, step_fraction=1.5)
    with pytest.raises(OptionError, match="surface"):
        dm.relaxation_walk(g, surface="rough")
    with pytest.raises(OptionError, match="rho2_by_interface"):
        dm.relaxation_walk(g, rho2_by_interface={"interlayer/gel": 1.0})
    with pytest.raises(OptionError, match="step_fraction"):   # rho delta / D too large
        dm.relaxation_walk(g, rho2_nm_per_us=1e9)
    solid = PhaseGrid(np.full((4, 4, 4), SOLID, np.uint8), 0.1)
    with pytest.raises(OptionError, match="no water"):
        dm.transport_walk(solid)


def test_memory_is_estimated_before_allocating():
    g = _two_class_grid()
    with pytest.raises(MemoryLimitError, match="walkers would fit"):
        dm.relaxation_walk(g, n_walkers=10 ** 6, max_memory=10 ** 6)


def test_per_interface_relaxivity_and_mirror_domain_wall():
    """A zero relaxivity on every wall leaves M = exp(−t/T2b) exactly (weights stay 1)."""
    g = _two_class_grid(periodic=False)
    r = dm.relaxation_walk(g, n_walkers=300, rho2_nm_per_us=0.0, t2_bulk_s=1e-7,
                           t_max_us=0.05, invert=False, compare_fast=False)
    np.testing.assert_allclose(r.m, np.exp(-r.t_us / 0.1), rtol=1e-12)
    r2 = dm.relaxation_walk(g, n_walkers=300, rho2_nm_per_us=0.0, t2_bulk_s=None,
                            rho2_by_interface={"gel/solid": 100.0}, t_max_us=0.01,
                            invert=False, compare_fast=False)
    assert r2.m_by_class["gel"][-1] < r2.m_by_class["gel"][0]


def test_figures_are_matplotlib_figures_without_global_state():
    import matplotlib
    from matplotlib.figure import Figure
    backend = matplotlib.get_backend()
    g = _two_class_grid()
    r = dm.relaxation_walk(g, n_walkers=500, seed=1, rho2_nm_per_us=200.0, t_max_us=0.02)
    t = dm.transport_walk(g, n_walkers=300, t_max_us=0.002)
    for fig in (figures.plot_decay(r), figures.plot_t2_spectrum(r), figures.plot_exchange(r),
                figures.plot_exchange(r.exchange), figures.plot_msd(t)):
        assert isinstance(fig, Figure)
    fig = Figure()
    ax = fig.add_subplot(1, 1, 1)
    assert figures.plot_msd(t, ax=ax) is fig
    assert matplotlib.get_backend() == backend


def test_bin_edges_line_up_with_relax():
    """The walk's T2 bins are those of relax where they overlap (same log grid)."""
    from sheetview.measures.relaxation import relaxation_spectrum
    g = _two_class_grid()
    r = dm.relaxation_walk(g, n_walkers=500, rho2_nm_per_us=200.0, t_max_us=0.02)
    base = relaxation_spectrum(g).edges            # 20 per decade from 1 µs
    k = (np.log10(r.spectrum.edges_s) - np.log10(base[0])) * 20
    np.testing.assert_allclose(k, np.round(k), atol=1e-6)
    np.testing.assert_allclose(np.log10(base[1] / base[0]) * 20, 1.0, rtol=1e-9)


def test_acceleration_option_and_move_counts():
    """Jumps happen only with the acceleration on and only where the walker is far from
    walls: in a 4-voxel slit nothing can jump; in a 30-voxel slit the jumps cover most of
    the time (fewer than 0.4 times the moves of the fixed-step walk)."""
    lab = np.full((8, 8, 6), SOLID, np.uint8)
    lab[:, :, 1:5] = GEL
    thin = PhaseGrid(lab, 0.2, periodic=True)
    r = dm.relaxation_walk(thin, n_walkers=500, t_max_us=0.005, invert=False,
                           compare_fast=False)
    assert r.settings["accelerate"] is True and r.settings["jumps_per_walker"] == 0
    lab = np.full((8, 8, 34), SOLID, np.uint8)
    lab[:, :, 2:32] = GEL
    big = PhaseGrid(lab, 0.2, periodic=True)
    on = dm.relaxation_walk(big, n_walkers=500, t_max_us=0.05, invert=False,
                            compare_fast=False)
    off = dm.relaxation_walk(big, n_walkers=500, t_max_us=0.05, invert=False,
                             compare_fast=False, accelerate=False)
    assert on.settings["jumps_per_walker"] > 100
    assert off.settings["jumps_per_walker"] == 0 and off.settings["accelerate"] is False
    assert on.steps < 0.4 * off.steps          # the jumps replace most fixed steps
    np.testing.assert_allclose(on.t_us, off.t_us)


def test_t2_t2_map_result_forms_and_figure():
    import matplotlib
    from matplotlib.figure import Figure
    backend = matplotlib.get_backend()
    g = _two_class_grid()
    r = dm.t2_t2_map(g, mixing_time_us=0.002, n_walkers=400, seed=2, rho2_nm_per_us=200.0,
                     n_times=8)
    assert isinstance(r, dm.T2T2Result)
    assert r.signal.shape == (8, 8) and r.signal[0, 0] == pytest.approx(1.0)
    assert r.amplitude.shape == (r.t2_s.size, r.t2_s.size)
    np.testing.assert_allclose(r.class_transfer.sum(), 1.0)
    d = json.loads(json.dumps(r.to_dict()))
    assert d["mixing_time_us"] == pytest.approx(0.002)
    assert {len(v) for v in r.table().values()} == {r.t2_s.size ** 2}
    assert 0.0 <= r.cross_fraction(float(np.median(r.t2_s))) <= 1.0
    fig = figures.plot_t2_t2(r)
    assert isinstance(fig, Figure)
    f2 = Figure()
    ax = f2.add_subplot(1, 1, 1)
    assert figures.plot_t2_t2(r, ax=ax) is f2
    assert matplotlib.get_backend() == backend
    several = dm.t2_t2_map(g, mixing_time_us=[0.0, 0.001], n_walkers=200, n_times=6,
                           rho2_nm_per_us=200.0, invert=False)
    assert isinstance(several, list) and len(several) == 2
    with pytest.raises(OptionError, match="mixing_time_us"):
        dm.t2_t2_map(g, mixing_time_us=-1.0)
    with pytest.raises(OptionError, match="n_times"):
        dm.t2_t2_map(g, mixing_time_us=1.0, n_times=2)


def test_walk_measures_run_through_measure():
    """The opt-in registry measures `water_walk` and `transport` run through
    `sheetview.measure`, add their headline to the summary, and write their tables and
    figures in a report folder."""
    import sheetview as sv
    lab = np.full((24, 24, 24), GEL, np.uint8)
    lab[:, :, 10:14] = SOLID
    g = PhaseGrid(lab, spacing=0.5, periodic=True)
    m = sv.measure(g, only="water_walk,transport", n_walkers=600)
    s = m.summary()
    assert s["water_walk"]["t2_logmean_ms"] > 0
    assert s["transport"]["d_eff_over_d0"]["x"] == pytest.approx(1.0, abs=0.15)
    assert s["transport"]["d_eff_over_d0"]["z"] < 0.2  # across the wall
    assert "water_walk" in s["basis"]
    import tempfile
    from pathlib import Path
    with tempfile.TemporaryDirectory() as d:
        names = {p.name for p in m.write(Path(d) / "r")}
    assert {"walk_decay.csv", "transport_msd.csv", "walk_decay.png", "transport_msd.png"} <= names
