"""Unit tests of sheetview.measures.chords: exact chords against a brute-force reference,
interval merging, voxel run lengths, periodic lines, errors."""
import numpy as np
import pytest

from sheetview.domain import Box, Sphere
from sheetview.errors import OptionError
from sheetview.grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid
from sheetview.measures.chords import (_domain_interval, exact_chords, iur_lines,
                                       merge_intervals, prism_planes, voxel_chords)
from sheetview.structure import Structure


def _random_prisms(n, seed, box=20.0):
    rng = np.random.default_rng(seed)
    c = rng.uniform(2, box - 2, (n, 1, 3))
    v = c + rng.normal(0, 1.5, (n, 3, 3))
    return v, rng.uniform(0.2, 1.0, n)


def _brute_solid_intervals(struct, o, u, tlo, thi, step=5e-4):
    """Dense point sampling along a line with a vectorised point-in-prism test
    (all 5 face planes), as a reference independent of the kernel."""
    P = prism_planes(struct.vertices, struct.normals, struct.thickness)
    t = np.arange(tlo + step / 2, thi, step)
    x = o + t[:, None] * u
    inside = np.zeros(len(t), bool)
    for p in P:
        inside |= np.all(x @ p[:, :3].T <= p[:, 3], axis=1)
    d = np.diff(np.concatenate([[0], inside.astype(int), [0]]))
    s, e = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
    return t[s] - step / 2, t[e - 1] + step / 2


def test_exact_chords_match_brute_force():
    v, th = _random_prisms(60, 0, box=10.0)
    s = Structure(v, th, Box((0, 0, 0), (10, 10, 10)))
    res = exact_chords(s, 60, seed=3, n_threads=1)
    # recompute the same lines
    c, R = np.full(3, 5.0), 0.5 * np.linalg.norm([10, 10, 10])
    o, u = iur_lines(60, c, R * (1 + 1e-9), 3)
    tlo, thi = _domain_interval(s.domain, o, u, np.full(60, 2 * R * (1 + 1e-9)))
    n_checked = 0
    for i in range(60):
        if not tlo[i] < thi[i]:
            continue
        bs, be = _brute_solid_intervals(s, o[i], u[i], tlo[i], thi[i])
        sel = res.line["solid"] == i
        L = np.sort(res.lengths["solid"][sel])
        ref = np.sort(be - bs)
        # chords shorter than the sampling step may be missed by the reference
        L = L[L > 1e-3]
        ref = ref[ref > 1e-3]
        assert len(L) == len(ref), i
        assert np.allclose(L, ref, atol=1.5e-3)
        n_checked += len(L)
        # pore chords fill the rest of the domain interval exactly
        total = res.lengths["solid"][sel].sum() + res.lengths["pore"][res.line["pore"] == i].sum()
        assert total == pytest.approx(thi[i] - tlo[i], abs=1e-9)
    assert n_checked > 20


def test_threads_and_seed_reproducible():
    v, th = _random_prisms(30, 1)
    s = Structure(v, th, Sphere((10, 10, 10), 12))
    a = exact_chords(s, 3000, seed=5, n_threads=1)
    b = exact_chords(s, 3000, seed=5, n_threads=2)
    for ph in ("solid", "pore"):
        assert np.allclose(np.sort(a.lengths[ph]), np.sort(b.lengths[ph]))
    assert a.to_dict()["phases"]["solid"]["n_chords"] > 0


def test_overlapping_prisms_merge():
    """A prism repeated, and a prism split into two overlapping halves, give the same
    chords as the single prism (intervals of overlapping prisms merge)."""
    tri = np.array([[[0, 0, 0], [6, 0, 0], [0, 6, 0]]], float)
    dom = Sphere((2, 2, 0), 5)
    one = exact_chords(Structure(tri, [1.0], dom), 3000, seed=1)
    two = exact_chords(Structure(np.concatenate([tri, tri]), [1.0, 1.0], dom), 3000, seed=1)
    assert np.allclose(one.lengths["solid"], two.lengths["solid"])
    # the same triangle as two overlapping sub-triangles (fan from two points)
    halves = np.array([[[0, 0, 0], [6, 0, 0], [0, 4, 0]], [[0, 0, 0], [3, 3, 0], [0, 6, 0]],
                       [[2, 0, 0], [6, 0, 0], [0, 6, 0]]], float)
    split = exact_chords(Structure(halves, [1.0] * 3, dom), 3000, seed=1)
    assert len(split.lengths["solid"]) == len(one.lengths["solid"])
    assert np.allclose(np.sort(split.lengths["solid"]), np.sort(one.lengths["solid"]), atol=1e-9)


def test_merge_intervals_numpy():
    line = [0, 0, 0, 1, 1]
    s = [0.0, 0.5, 3.0, 1.0, 2.0]
    e = [1.0, 2.0, 4.0, 1.5, 2.5]
    l, a, b = merge_intervals(line, s, e)
    assert l.tolist() == [0, 0, 1, 1]
    assert a.tolist() == [0.0, 3.0, 1.0, 2.0]
    assert b.tolist() == [2.0, 4.0, 1.5, 2.5]


def _runs_loop(row):
    out, k = [], 0
    while k < len(row):
        if row[k]:
            j = k
            while j < len(row) and row[j]:
                j += 1
            out.append((k, j - k))
            k = j
        else:
            k += 1
    return out


def test_voxel_chords_match_loop_and_flags():
    rng = np.random.default_rng(2)
    lab = rng.choice([SOLID, GEL, INTERLAYER], size=(7, 8, 9)).astype(np.uint8)
    lab[0, :, :] = OUTSIDE
    g = PhaseGrid(lab, spacing=(0.5, 1.0, 2.0))
    r = voxel_chords(g, [GEL, INTERLAYER], axes=(2,), name="pore")
    ref_len, ref_cut = [], []
    m = np.isin(lab, [GEL, INTERLAYER])
    for i in range(7):
        for j in range(8):
            for st, ln in _runs_loop(m[i, j]):
                ref_len.append(ln * 2.0)
                cut = st == 0 or st + ln == 9 or lab[i, j, max(st - 1, 0)] == OUTSIDE and st > 0
                ref_cut.append(cut)
    assert np.allclose(r.lengths["pore"], ref_len)
    assert r.cut["pore"].tolist() == ref_cut
    assert r.axis["pore"].tolist() == [2] * len(ref_len)
    # x axis: runs next to the OUTSIDE layer at i = 0 are cut
    rx = voxel_chords(g, GEL, axes=(0,))
    assert np.all(rx.cut["phase"][np.isin(rx.line["phase"], np.arange(72))] | True)


def test_voxel_chords_periodic_wrap():
    lab = np.full((1, 1, 10), SOLID, np.uint8)
    lab[0, 0, [8, 9, 0, 1]] = GEL  # a run of 4 across the edge
    lab[0, 0, 4] = GEL
    g = PhaseGrid(lab, periodic=True)
    r = voxel_chords(g, GEL, axes=(2,))
    assert sorted(r.lengths["phase"].tolist()) == [1.0, 4.0]
    assert not r.cut["phase"].any()
    full = PhaseGrid(np.full((1, 1, 5), GEL, np.uint8), periodic=True)
    rf = voxel_chords(full, GEL, axes=(2,))
    assert rf.lengths["phase"].tolist() == [5.0] and rf.cut["phase"].all()


def test_periodic_prisms_wrap_across_cell():
    """A prism crossing the cell face is found through its periodic image: chords of
    lines in a periodic box equal those of the same structure shifted by a cell vector."""
    tri = np.array([[[8, 2, 2], [13, 2, 2], [8, 7, 2]]], float)
    b = Box((0, 0, 0), (10, 10, 10), periodic=True)
    a = exact_chords(Structure(tri, [2.0], b), 400, seed=2, line_length=40)
    c = exact_chords(Structure(tri - [10, 0, 0], [2.0], b), 400, seed=2, line_length=40)
    assert a.lengths["solid"].size > 50
    assert np.allclose(np.sort(a.lengths["solid"]), np.sort(c.lengths["solid"]), atol=1e-9)
    total = a.lengths["solid"].sum() + a.lengths["pore"].sum()
    assert total == pytest.approx(400 * 40, rel=1e-9)


def test_table_and_dict():
    v, th = _random_prisms(10, 4)
    r = exact_chords(Structure(v, th, Box((0, 0, 0), (20, 20, 20))), 200, seed=0)
    t = r.table()
    assert len({len(c) for c in t.values()}) == 1
    d = r.to_dict()
    assert set(d["phases"]) == {"solid", "pore"}
    counts, edges = r.histogram("pore", bins=10)
    assert len(edges) == 11
    # a density integrates to 1 (numpy's density=True, computed here from the counts)
    x = r.chords("solid")
    dens, e = r.histogram("solid", bins=7)
    ref, ref_e = np.histogram(x, bins=7, density=True)
    assert np.allclose(dens, ref) and np.allclose(e, ref_e)
    # no interior pore chord here (10 small prisms in a 20 nm box: every pore line is cut by
    # the box): an empty density is zeros, not NaN
    assert len(r.chords("pore")) == 0
    assert np.array_equal(counts, np.zeros(10))


def test_bad_inputs():
    v, th = _random_prisms(3, 0)
    s = Structure(v, th, Box((0, 0, 0), (20, 20, 20)))
    with pytest.raises(OptionError, match="n_lines"):
        exact_chords(s, 0)
    with pytest.raises(OptionError, match="Structure or a SurfaceBody"):
        exact_chords(np.zeros(3), 10)
    with pytest.raises(OptionError, match="axes"):
        voxel_chords(PhaseGrid(np.zeros((2, 2, 2), np.uint8)), GEL, axes=(3,))
    r = exact_chords(s, 10, seed=0)
    with pytest.raises(OptionError, match="unknown phase"):
        r.mean("gel")


def _pore_reference(il, is_, ie, tlo, thi, eps):
    """Straightforward numpy construction of pore chords (gaps, leading/trailing gaps,
    empty lines), ordered with numpy.lexsort by line then length (stable)."""
    n = len(tlo)
    same = il[1:] == il[:-1]
    first = np.ones(len(il), bool)
    first[1:] = ~same
    last = np.ones(len(il), bool)
    last[:-1] = ~same
    hit = np.zeros(n, bool)
    hit[il] = True
    empty = (~hit) & (tlo < thi)
    ln = np.concatenate([(is_[1:] - ie[:-1])[same], is_[first] - tlo[il[first]],
                         thi[il[last]] - ie[last], (thi - tlo)[empty]])
    li = np.concatenate([il[1:][same], il[first], il[last], np.flatnonzero(empty)])
    cut = np.concatenate([np.zeros(int(same.sum()), bool), np.ones(int(2 * first.sum() + empty.sum()), bool)])
    k = ln > eps
    o = np.lexsort((ln[k], li[k]))
    return ln[k][o], cut[k][o], li[k][o]


def test_pore_chords_kernel_matches_numpy_lexsort():
    """The numba pore-chord kernel gives the same arrays, in the same order (ties of
    equal length included), as a numpy.lexsort construction (general-purpose reference)."""
    from sheetview.measures.chords import _chords_from_intervals
    rng = np.random.default_rng(5)
    n = 300
    tlo = np.zeros(n)
    thi = np.full(n, 10.0)
    thi[::17] = -1.0  # lines missing the domain
    L, S, E = [], [], []
    for i in range(n):
        if thi[i] < 0 or i % 5 == 0:
            continue
        # quarter-integer ends: many equal gap lengths (ties), some touching the walls
        k = rng.integers(1, 6)
        ends = np.unique(rng.integers(0, 41, 2 * k)) / 4.0
        for a, b in zip(ends[0::2], ends[1::2]):
            L.append(i)
            S.append(a)
            E.append(b)
    il, is_, ie = np.array(L), np.array(S), np.array(E)
    lengths, cut, line = _chords_from_intervals(il, is_, ie, tlo, thi, 1e-9)
    ref = _pore_reference(il, is_, ie, tlo, thi, 1e-9)
    np.testing.assert_array_equal(lengths["pore"], ref[0])
    np.testing.assert_array_equal(cut["pore"], ref[1])
    np.testing.assert_array_equal(line["pore"], ref[2])
    assert np.any(np.diff(ref[0]) == 0)  # ties were exercised


def test_line_order_does_not_change_chords():
    """Lines are walked in a spatial order and regrouped: the chords equal those of the
    same lines cast one at a time, in the caller's order (identical arrays)."""
    from sheetview.measures.chords import _prisms_run
    v, th = _random_prisms(300, 2, box=20.0)
    s = Structure(v, th, Sphere((10, 10, 10), 12.0))
    o, u = iur_lines(400, np.full(3, 10.0), 12.0, 4)
    tlo, thi = _domain_interval(s.domain, o, u, np.full(400, 24.0))
    il, is_, ie = _prisms_run(o, u, tlo, thi, s.vertices, s.normals, s.thickness, 1e-9, 2)
    assert np.all(np.diff(il) >= 0)
    for i in range(0, 400, 7):
        one = _prisms_run(o[i:i + 1], u[i:i + 1], tlo[i:i + 1], thi[i:i + 1], s.vertices,
                          s.normals, s.thickness, 1e-9, 1)
        np.testing.assert_array_equal(one[1], is_[il == i])
        np.testing.assert_array_equal(one[2], ie[il == i])
    assert len(il) > 100
