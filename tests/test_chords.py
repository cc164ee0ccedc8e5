"""Unit tests of sheetview.measures.chords: exact chords against a brute-force reference,
interval merging, voxel run lengths, periodic lines, errors."""
import numpy as np
import pytest

from sheetview.domain import Box, Sphere
from sheetview.errors import OptionError
from sheetview.grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid
from sheetview.measures._rays import domain_interval
from sheetview.measures.chords import (exact_chords, iur_lines,
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
    """Exact prism chords (2 threads: lines sorted in space, cut into chunks and regrouped)
    against dense point sampling with a vectorised point-in-prism test."""
    v, th = _random_prisms(60, 0, box=10.0)
    s = Structure(v, th, Box((0, 0, 0), (10, 10, 10)))
    n = 300
    res = exact_chords(s, n, seed=3, n_threads=2)
    # recompute the same lines
    c, R = np.full(3, 5.0), 0.5 * np.linalg.norm([10, 10, 10])
    o, u = iur_lines(n, c, R * (1 + 1e-9), 3)
    tlo, thi = domain_interval(s.domain, o, u, np.full(n, 2 * R * (1 + 1e-9)))
    n_checked = 0
    for i in range(n):
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
    assert n_checked > 100


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
    # x axis: a run starting at i = 1, next to the OUTSIDE layer at i = 0, is cut, as is
    # a run reaching i = 6 (the grid edge); others are not
    rx = voxel_chords(g, GEL, axes=(0,))
    mg = lab == GEL
    ref_len, ref_cut = [], []
    for j in range(8):
        for k in range(9):
            for st, ln in _runs_loop(mg[:, j, k]):
                ref_len.append(ln * 0.5)
                ref_cut.append(st == 0 or st + ln == 7 or lab[st - 1, j, k] == OUTSIDE)
    assert np.allclose(rx.lengths["phase"], ref_len)
    assert rx.cut["phase"].tolist() == ref_cut
    assert any(ref_cut) and not all(ref_cut)


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


# ------------------------------------------------------------ chords of voxel grids
def _random_labels(shape, seed, outside=True):
    """Smooth random two-phase labels (Gaussian-filtered noise), pore split into codes
    2, 3 and 4, a few single solid voxels (thin features), OUTSIDE beyond an ellipsoid."""
    from scipy import ndimage as ndi
    rng = np.random.default_rng(seed)
    f = ndi.gaussian_filter(rng.normal(size=shape), 1.5)
    lab = np.where(f > 0, SOLID, GEL).astype(np.uint8)
    lab[(f <= 0) & (rng.random(shape) < 0.3)] = INTERLAYER
    lab[(f <= 0) & (rng.random(shape) < 0.1)] = 4
    lab[rng.random(shape) < 0.005] = SOLID
    if outside:
        idx = np.indices(shape).astype(float)
        c = (np.asarray(shape)[:, None, None, None] - 1) / 2
        r = np.sqrt((((idx - c) / (0.55 * np.asarray(shape)[:, None, None, None])) ** 2).sum(0))
        lab[r > 1] = OUTSIDE
    return lab


def _test_lines(shape, spacing, n, seed, periodic, length=None):
    """Random lines meeting the grid box: origins and unit directions in nm, and their
    parameter interval (slab clipping to the box; periodic: [0, length])."""
    rng = np.random.default_rng(seed)
    ext = np.asarray(shape) * np.asarray(spacing)
    u = rng.normal(size=(n, 3))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    p = rng.random((n, 3)) * ext
    if periodic:
        return p, u, np.zeros(n), np.full(n, float(length))
    t1 = (0 - p) / u
    t2 = (ext - p) / u
    tlo = np.minimum(t1, t2).max(axis=1)
    thi = np.maximum(t1, t2).min(axis=1)
    return p + tlo[:, None] * u, u, np.zeros(n), thi - tlo


def _runs_to_chords(t_edges, valid, solid):
    """Chords from consecutive intervals [t_edges[k], t_edges[k+1]] with validity and
    phase: (length, solid, cut) in order along the line."""
    out = []
    k, m = 0, len(valid)
    while k < m:
        if not valid[k]:
            k += 1
            continue
        j = k
        while j < m and valid[j]:
            j += 1
        # a valid segment k..j-1: runs of equal phase
        a = k
        while a < j:
            b = a
            while b < j and solid[b] == solid[a]:
                b += 1
            out.append((t_edges[b] - t_edges[a], bool(solid[a]), a == k or b == j))
            a = b
        k = j
    return out


def _faces_reference(lab, spacing, o, u, t0, t1, periodic):
    """Chords of the union of voxel cubes along one line, by brute force: every crossing
    of the line with a plane of voxel faces (all planes, numpy), the label at the middle
    of each interval between consecutive crossings."""
    sp = np.asarray(spacing, float)
    n = np.asarray(lab.shape)
    q0 = o / sp
    dq = u / sp
    ts = [np.array([t0, t1])]
    for a in range(3):
        if dq[a] != 0:
            qa, qb = q0[a] + t0 * dq[a], q0[a] + t1 * dq[a]
            m = np.arange(np.ceil(min(qa, qb)), np.floor(max(qa, qb)) + 1)
            ts.append((m - q0[a]) / dq[a])
    t = np.unique(np.concatenate(ts))
    t = t[(t >= t0) & (t <= t1)]
    mid = 0.5 * (t[1:] + t[:-1])
    idx = np.floor(q0 + mid[:, None] * dq).astype(int)
    idx = idx % n if periodic else np.clip(idx, 0, n - 1)
    L = lab[idx[:, 0], idx[:, 1], idx[:, 2]]
    return _runs_to_chords(t, L != OUTSIDE, L == SOLID)


def _reference_field(lab, periodic):
    """The signed distance of the definition, from scipy's exact Euclidean distance
    transform: d_p - 1/2 on solid, 1/2 - d_s on pore, 0 on OUTSIDE, clamped to +-4."""
    from scipy import ndimage as ndi
    solid = lab == SOLID
    pore = (lab != SOLID) & (lab != OUTSIDE)
    if periodic:
        m = 6
        big = np.pad(lab, m, mode="wrap")
        F = _reference_field(big, False)
        return F[m:-m, m:-m, m:-m]
    d_p = ndi.distance_transform_edt(~pore) if pore.any() else np.full(lab.shape, np.inf)
    d_s = ndi.distance_transform_edt(~solid) if solid.any() else np.full(lab.shape, np.inf)
    F = np.where(solid, d_p - 0.5, np.where(pore, 0.5 - d_s, 0.0))
    return np.clip(F, -4, 4)


def _interp_reference(lab, F, spacing, o, u, t0, t1, periodic, tau, step):
    """Chords of the interpolated boundary along one line, by dense sampling: the label
    of the voxel holding each sample (OUTSIDE: not valid), the trilinear interpolation of
    F from the 8 nearest voxel centres (OUTSIDE corners replaced by the mean of the
    others), a phase change once the field is tau deep in the other phase, placed at the
    last sign change (linear interpolation between samples)."""
    sp = np.asarray(spacing, float)
    n = np.asarray(lab.shape)
    t = np.linspace(t0, t1, max(2, int(np.ceil((t1 - t0) / step)) + 1))
    q = (o + t[:, None] * u) / sp
    vox = np.floor(q).astype(int)
    vox = vox % n if periodic else np.clip(vox, 0, n - 1)
    valid = lab[vox[:, 0], vox[:, 1], vox[:, 2]] != OUTSIDE
    i0 = np.floor(q - 0.5).astype(int)
    f = q - 0.5 - i0
    vals = np.zeros(len(t))
    wsum = np.zeros(len(t))
    cs, vs, ws = [], [], []
    for dx in (0, 1):
        for dy in (0, 1):
            for dz in (0, 1):
                ii = i0 + np.array([dx, dy, dz])
                ii = ii % n if periodic else np.clip(ii, 0, n - 1)
                cval = F[ii[:, 0], ii[:, 1], ii[:, 2]]
                cok = lab[ii[:, 0], ii[:, 1], ii[:, 2]] != OUTSIDE
                w = ((f[:, 0] if dx else 1 - f[:, 0]) * (f[:, 1] if dy else 1 - f[:, 1])
                     * (f[:, 2] if dz else 1 - f[:, 2]))
                cs.append(cval)
                vs.append(cok)
                ws.append(w)
    cs, vs, ws = np.array(cs), np.array(vs), np.array(ws)
    mean = (cs * vs).sum(0) / np.maximum(vs.sum(0), 1)
    vals = (np.where(vs, cs, mean[None, :]) * ws).sum(0)
    out = []
    d = np.diff(np.concatenate([[0], valid.astype(int), [0]]))
    for a, b in zip(np.flatnonzero(d == 1), np.flatnonzero(d == -1)):
        ta = t0 if a == 0 else 0.5 * (t[a - 1] + t[a])
        tb = t1 if b == len(t) else 0.5 * (t[b - 1] + t[b])
        v, tt = vals[a:b], t[a:b]
        state = v[0] > 0
        cstart, zero, first = ta, ta, True
        s = v > 0
        zc = np.flatnonzero(s[1:] != s[:-1]) + 1
        deep = np.flatnonzero(((v[1:] < -tau) & (v[:-1] >= -tau)) | ((v[1:] > tau) & (v[:-1] <= tau))) + 1
        ev = sorted([(k, 0) for k in zc] + [(k, 1) for k in deep])
        for k, kind in ev:
            if kind == 0:
                zero = tt[k - 1] + (tt[k] - tt[k - 1]) * v[k - 1] / (v[k - 1] - v[k])
            elif (v[k] > 0) != state:
                out.append((zero - cstart, state, first))
                first, cstart, state = False, zero, not state
        out.append((tb - cstart, state, True))
    return out


def _kernel_chords(lab, F, spacing, o, u, t0, t1, periodic, interp, tau=0.3):
    from sheetview.measures.chords import _voxel_line_chords
    lut = np.zeros(256, np.bool_)
    lut[SOLID] = True
    sp = np.asarray(spacing, float)
    n = len(o)
    return _voxel_line_chords(np.ascontiguousarray(lab), F.astype(np.float32), lut, o / sp,
                              u / sp, t0, t1, np.arange(n), periodic, interp, tau)


def _compare_lines(res, refs, atol):
    """Per line: the same sequence of (phase, cut) and lengths within atol."""
    il, ln, so, cu = res
    for i, ref in enumerate(refs):
        sel = il == i
        mine = list(zip(ln[sel], so[sel], cu[sel]))
        ref = [r for r in ref if r[0] > 0]
        assert [(bool(a[1]), bool(a[2])) for a in mine] == [(r[1], r[2]) for r in ref], i
        assert np.allclose([a[0] for a in mine], [r[0] for r in ref], atol=atol), i


@pytest.mark.parametrize("periodic", [False, True])
def test_voxel_faces_chords_match_brute_force(periodic):
    """Chords of the union of voxel cubes (boundary="faces"): the DDA kernel against every
    crossing of each line with every plane of voxel faces (numpy), anisotropic voxels,
    OUTSIDE voxels, split pore codes; periodic lines wrap."""
    shape, spacing = (17, 21, 13), (0.5, 0.7, 0.6)
    lab = _random_labels(shape, 1, outside=not periodic)
    o, u, t0, t1 = _test_lines(shape, spacing, 150, 2, periodic, length=40.0)
    res = _kernel_chords(lab, np.zeros((1, 1, 1)), spacing, o, u, t0, t1, periodic, False)
    refs = [_faces_reference(lab, spacing, o[i], u[i], t0[i], t1[i], periodic)
            for i in range(len(o))]
    _compare_lines(res, refs, 1e-9)
    assert len(res[0]) > 300 and res[2].any() and (~res[2]).any()


@pytest.mark.parametrize("periodic", [False, True])
def test_voxel_interpolated_chords_match_dense_sampling(periodic):
    """Chords of the interpolated boundary (default): the exact per-cell kernel against
    dense sampling (every 2e-3 nm) of the trilinear field in numpy with the same
    hysteresis rule; anisotropic voxels, OUTSIDE voxels, split pore codes, wrapping."""
    shape, spacing = (17, 21, 13), (0.5, 0.7, 0.6)
    lab = _random_labels(shape, 3, outside=not periodic)
    F = _reference_field(lab, periodic)
    o, u, t0, t1 = _test_lines(shape, spacing, 200, 4, periodic, length=25.0)
    res = _kernel_chords(lab, F, spacing, o, u, t0, t1, periodic, True)
    refs = [_interp_reference(lab, F, spacing, o[i], u[i], t0[i], t1[i], periodic, 0.3, 2e-3)
            for i in range(len(o))]
    _compare_lines(res, refs, 5e-3)
    assert len(res[0]) > 400 and res[2].any() and (~res[2]).any()


@pytest.mark.parametrize("periodic", [False, True])
def test_signed_distance_matches_scipy(periodic):
    """The capped separable distance transform gives the signed distance of the
    definition computed with scipy's exact Euclidean distance transform (float32
    rounding), with OUTSIDE voxels, split pore codes and, for a periodic grid, wrapping;
    also on a grid of one phase with a few voxels of the other (distances beyond the
    clamp)."""
    from sheetview.measures.chords import signed_distance
    for lab in (_random_labels((23, 9, 11), 5, outside=not periodic),
                np.where(np.random.default_rng(1).random((14, 15, 16)) < 0.003, SOLID,
                         GEL).astype(np.uint8)):
        g = PhaseGrid(lab, periodic=periodic)
        assert np.allclose(signed_distance(g), _reference_field(lab, periodic), atol=1e-5)


# --------------------------------------------------------------- the measure itself
def _chord_docs(obj, settings):
    import json

    from sheetview import measure
    out = []
    for only in (["chords"], ["chords", "surface"], ["surface", "chords"]):
        m = measure(obj, only=only, **settings)
        out.append(json.dumps(m.results["chords"].to_dict(), sort_keys=True))
    return out


@pytest.mark.parametrize("kind", ["prisms", "volume"])
def test_chord_results_do_not_depend_on_other_measures(kind):
    """`sheetview.measure(obj, only=...)` (what `measure --only` runs) with chords,
    chords + surface and surface + chords gives identical chord results (the Cauchy figures come from the grid, not from the surface measure), with a
    finite Cauchy figure for both phases; a box domain's wall counts in the pore boundary."""
    v, th = _random_prisms(40, 7, box=12.0)
    s = Structure(v, th * 2, Box((0, 0, 0), (12, 12, 12)))
    obj = s
    settings = {"voxel": 0.25, "lines": 400, "seed": 1}
    if kind == "volume":
        from sheetview.grid import rasterize
        obj = rasterize(s, 0.25)
    docs = _chord_docs(obj, settings)
    assert docs[0] == docs[1] == docs[2]
    import json
    d = json.loads(docs[0])
    assert d["cauchy_solid_4v_over_s_nm"] > 0 and d["cauchy_pore_4v_over_s_nm"] > 0
    assert d["cauchy"]["areas_nm2"]["pore-grid_edge"] > 0
    if kind == "volume":
        assert d["source"].startswith("voxel grid: isotropic random lines")
        assert d["voxel_lines"]["method"] == "iur-voxels" and d["voxel_rows"] is not None
    else:
        assert d["source"] == "isotropic random lines, exact prisms geometry"
        assert d["voxel_lines"] is None and d["voxel_rows"] is None


def test_grid_chords_bad_options():
    g = PhaseGrid(_random_labels((8, 9, 10), 0, outside=False))
    from sheetview.measures.chords import cauchy_figures, grid_chords, voxel_rows
    with pytest.raises(OptionError, match="boundary"):
        grid_chords(g, 10, boundary="smooth")
    with pytest.raises(OptionError, match="hysteresis"):
        grid_chords(g, 10, hysteresis=0.5)
    with pytest.raises(OptionError, match="n_lines"):
        grid_chords(g, 0)
    with pytest.raises(OptionError, match="solid"):
        grid_chords(g, 10, solid=[0])
    with pytest.raises(OptionError, match="domain"):
        grid_chords(g, 10, domain=Box((0, 0, 0), (1, 1, 1), periodic=True))
    with pytest.raises(OptionError, match="PhaseGrid"):
        grid_chords(np.zeros((3, 3, 3)), 10)
    with pytest.raises(OptionError, match="PhaseGrid"):
        cauchy_figures(np.zeros((3, 3, 3)))
    with pytest.raises(OptionError, match="axes"):
        voxel_rows(g, axes=(4,))
    with pytest.raises(OptionError, match="line_length"):
        grid_chords(PhaseGrid(g.labels, periodic=True), 10, line_length=-1)
    with pytest.raises(OptionError, match="non-periodic"):
        grid_chords(PhaseGrid(g.labels, periodic=True), 10, domain=Sphere((1, 1, 1), 1))


def test_voxel_rows_match_loop():
    """Pore run lengths along z (every label but OUTSIDE and solid: codes 2, 3, 4) and
    their cut flags against a plain loop."""
    from sheetview.measures.chords import voxel_rows
    lab = _random_labels((6, 7, 15), 9, outside=True)
    g = PhaseGrid(lab, spacing=(0.5, 1.0, 0.3))
    r = voxel_rows(g, axes=(2,))
    pore = (lab != SOLID) & (lab != OUTSIDE)
    ref_len, ref_cut = [], []
    for i in range(6):
        for j in range(7):
            for st, ln in _runs_loop(pore[i, j]):
                ref_len.append(ln * 0.3)
                ref_cut.append(st == 0 or st + ln == 15 or lab[i, j, st - 1] == OUTSIDE
                               or lab[i, j, min(st + ln, 14)] == OUTSIDE)
    assert np.allclose(r.lengths["pore"], ref_len)
    assert r.cut["pore"].tolist() == ref_cut
    assert any(ref_cut) and not all(ref_cut)


@pytest.mark.parametrize("periodic", [False, True])
def test_cauchy_areas_equal_surface_interface_areas(periodic):
    """The one-pass pair counts of cauchy_figures give the Crofton interface areas of
    sheetview.measures.surface.interface_areas_with (the estimator of the surface
    measure), label by label; volumes are voxel counts; the grid edge is counted exactly
    (a non-periodic grid: the share of its outer faces, from numpy)."""
    from sheetview.measures.chords import cauchy_figures
    from sheetview.measures.surface import interface_areas_with
    lab = _random_labels((13, 17, 11), 4, outside=True)
    g = PhaseGrid(lab, spacing=(0.5, 0.7, 0.6), periodic=periodic)
    cf = cauchy_figures(g)
    ts, to = interface_areas_with(g, SOLID), interface_areas_with(g, OUTSIDE)
    pore = [INTERLAYER, GEL, 4]
    assert cf.areas["solid-pore"] == pytest.approx(ts[pore].sum(), rel=1e-12)
    assert cf.areas["solid-outside"] == pytest.approx(ts[OUTSIDE], rel=1e-12)
    assert cf.areas["pore-outside"] == pytest.approx(to[pore].sum(), rel=1e-12)
    vv = 0.5 * 0.7 * 0.6
    assert cf.volumes["solid"] == pytest.approx((lab == SOLID).sum() * vv)
    assert cf.volumes["pore"] == pytest.approx(np.isin(lab, pore).sum() * vv)
    faces = {0: 0.7 * 0.6, 1: 0.5 * 0.6, 2: 0.5 * 0.7}
    edge = sum(faces[a] * np.count_nonzero(np.take(lab, i, axis=a) == SOLID)
               for a in range(3) for i in (0, lab.shape[a] - 1))
    assert cf.areas["solid-grid_edge"] == pytest.approx(0.0 if periodic else edge)
    assert edge > 0


def test_argsort_stable_matches_numpy():
    """The hand-written kernel sort of the chord kernels (``_rays.argsort_stable``) gives
    numpy's stable argsort (``np.argsort(kind="stable")``, the reference) on random values
    with many ties, for lengths around its run size of 16 and its merge widths, and
    leaves the entries past ``n`` alone."""
    from sheetview.measures._rays import argsort_stable
    rng = np.random.default_rng(7)
    for n in [0, 1, 2, 15, 16, 17, 31, 33, 64, 100, 257, 1000]:
        for ties in (True, False):
            x = rng.integers(0, 5, n + 3).astype(float) if ties else rng.normal(size=n + 3)
            idx = np.full(n + 3, -7, np.int64)
            argsort_stable(x, n, idx, np.empty(n + 3, np.int64))
            np.testing.assert_array_equal(idx[:n], np.argsort(x[:n], kind="stable"))
            assert (idx[n:] == -7).all()
