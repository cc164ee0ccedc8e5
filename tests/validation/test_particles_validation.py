"""Particle packings (sheetview.particles, io.particles, synth.pack_particles, the chord and
correlation measures on particles) checked against closed forms of geometry and stochastic
geometry and against general-purpose libraries (scipy). Shapes are placed at random
sub-voxel offsets and random orientations, at the default voxel unless said otherwise."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import special, stats
from scipy.spatial import cKDTree

from sheetview.domain import Box
from sheetview.grid import INTERLAYER, SOLID
from sheetview.measures.chords import exact_chords
from sheetview.measures.correlation import two_point_correlation
from sheetview.measures.stacking import stacking
from sheetview.measures.phases import classify
from sheetview.particles import ParticleSet, layered_structure, random_quaternions
from sheetview.synth import pack_particles


def legendre_surface(a, b, c):
    """Ellipsoid surface by Legendre's form (a >= b >= c; DLMF 19.33.2):
    S = 2 pi c^2 + 2 pi a b / sin(phi) (E(phi, k) sin^2 phi + F(phi, k) cos^2 phi),
    cos(phi) = c / a, k^2 = a^2 (b^2 - c^2) / (b^2 (a^2 - c^2)); scipy's incomplete elliptic
    integrals take m = k^2."""
    a, b, c = sorted((a, b, c), reverse=True)
    phi = math.acos(c / a)
    m = a * a * (b * b - c * c) / (b * b * (a * a - c * c))
    s = math.sin(phi)
    return 2 * math.pi * c * c + 2 * math.pi * a * b / s * (
        special.ellipeinc(phi, m) * s * s + special.ellipkinc(phi, m) * math.cos(phi) ** 2)


def test_sphere_and_ellipsoid_surface_closed_forms():
    """Exact surfaces (Carlson form, scipy.special.elliprg) against 4 pi R^2 (Archimedes),
    the prolate and oblate spheroid closed forms (2 pi a^2 (1 + c/(a e) asin e),
    2 pi a^2 (1 + (1 - e^2)/e atanh e)) and Legendre's form for triaxial ellipsoids
    (DLMF 19.33.2, incomplete integrals of scipy); relative 1e-12. Volumes 4/3 pi abc."""
    rng = np.random.default_rng(3)
    semi = np.vstack([[2.0, 2.0, 2.0], [1.0, 1.0, 3.0], [3.0, 3.0, 1.0],
                      rng.uniform(0.3, 4.0, (20, 3))])
    ps = ParticleSet(np.zeros((len(semi), 3)), semi, random_quaternions(len(semi), 1),
                     Box((-9, -9, -9), (9, 9, 9)))
    assert ps.surfaces[0] == pytest.approx(4 * math.pi * 4, rel=1e-13)
    e = math.sqrt(1 - 1 / 9)
    assert ps.surfaces[1] == pytest.approx(2 * math.pi * (1 + 3 / e * math.asin(e)), rel=1e-12)
    assert ps.surfaces[2] == pytest.approx(2 * math.pi * 9 * (1 + (1 - e * e) / e * math.atanh(e)),
                                           rel=1e-12)
    for s, got in zip(semi[3:], ps.surfaces[3:]):
        assert got == pytest.approx(legendre_surface(*s), rel=1e-11)
    assert np.allclose(ps.volumes, 4 / 3 * math.pi * semi.prod(axis=1), rtol=1e-14)


def test_sphere_chord_length_distribution():
    """Chords of isotropic uniform random lines through a sphere of radius R have density
    f(l) = l / (2 R^2) on [0, 2R] (Santalo 1976, Integral Geometry and Geometric
    Probability, chord power integrals): Kolmogorov-Smirnov test against F(l) = l^2/(4R^2)
    (scipy.stats.kstest, p > 0.001), mean 4R/3 = 4V/S (Cauchy) within 4 SE."""
    R = 1.7
    ps = ParticleSet([[0.31, -0.22, 0.17]], [R], [1.0, 0, 0, 0], Box((-3, -3, -3), (3, 3, 3)),
                     kind="spheres")
    res = exact_chords(ps, 40000, seed=5)
    L = res.chords("solid")
    assert L.size > 1000 and L.max() <= 2 * R + 1e-9
    p = stats.kstest(L, lambda x: np.clip(x / (2 * R), 0, 1) ** 2).pvalue
    assert p > 1e-3
    se = L.std() / math.sqrt(L.size)
    assert abs(L.mean() - 4 * R / 3) < 4 * se


def test_ellipsoid_mean_chord_is_cauchy():
    """Mean chord of isotropic uniform random lines through a convex body = 4V/S (Cauchy;
    Santalo 1976), for random triaxial ellipsoids, with S from Legendre's form (DLMF
    19.33.2): within 4 SE."""
    rng = np.random.default_rng(11)
    for k in range(3):
        s = rng.uniform(0.5, 2.5, 3)
        h = float(s.max()) + 0.5
        ps = ParticleSet([rng.uniform(-0.3, 0.3, 3)], [s], random_quaternions(1, k),
                         Box((-h, -h, -h), (h, h, h)))
        L = exact_chords(ps, 80000, seed=k).chords("solid")
        assert L.size > 3000
        want = 4 * (4 / 3 * math.pi * s.prod()) / legendre_surface(*s)
        assert abs(L.mean() - want) < 4 * L.std() / math.sqrt(L.size)


def _separated_ellipsoids(seed, n=27, cell=5.0):
    """One random ellipsoid (semi-axes 0.6-1.8 nm, random orientation, random offset) per
    cell of a 3 x 3 x 3 lattice, so none overlap (invented test data)."""
    rng = np.random.default_rng(seed)
    idx = np.argwhere(np.ones((3, 3, 3)))
    semi = rng.uniform(0.6, 1.8, (n, 3))
    c = (idx + 0.5) * cell + rng.uniform(-0.4, 0.4, (n, 3))
    return ParticleSet(c, semi, random_quaternions(n, seed + 100),
                       Box((0, 0, 0), (3 * cell,) * 3))


def test_rasterized_ellipsoid_volume_at_the_default_voxel():
    """27 non-overlapping random ellipsoids in 6 random placements, default voxel: solid
    voxel volume against sum 4/3 pi abc (Archimedes' closed form): each placement within
    1 %, mean within 4 SE + 0.1 % (voxel-centre sampling is unbiased over random offsets)."""
    errs = []
    for seed in range(6):
        ps = _separated_ellipsoids(seed)
        g = ps.rasterize()
        vol = np.count_nonzero(g.labels == SOLID) * g.voxel_volume
        errs.append(vol / ps.volume - 1)
    errs = np.asarray(errs)
    assert np.abs(errs).max() < 0.01, errs
    assert abs(errs.mean()) < 4 * errs.std(ddof=1) / math.sqrt(len(errs)) + 1e-3, errs


def test_rasterized_surface_of_ellipsoids():
    """Solid-pore interface of the phase grid (Crofton estimate over 13 lattice directions,
    sheetview.measures.surface) of 27 random ellipsoids at the default voxel against the
    exact surfaces (Legendre's form, DLMF 19.33.2): within 3 %."""
    from sheetview.measures.surface import interface_area
    ps = _separated_ellipsoids(7)
    g = ps.rasterize()
    want = sum(legendre_surface(*s) for s in ps.semi_axes)
    assert interface_area(g, [SOLID], [3]) == pytest.approx(want, rel=0.03)


def test_boolean_model_porosity_and_s2():
    """Overlapping spheres of radius R at Poisson centres (intensity rho) in a periodic box:
    porosity exp(-rho 4 pi R^3 / 3) and pore two-point function
    S2(r) = exp(-rho V_2(r)), V_2(r) = 2V - V_lens(r) the union of two balls at distance r
    (Torquato 2002, Random Heterogeneous Materials, Springer: overlapping spheres);
    solid S2 = 1 - 2 p + S2_pore. Realised porosity within 0.02 of the expectation; S2 of the
    solid (sheetview's correlation measure) within 0.02 at r = 0.5..4 nm, 0.2 nm voxel."""
    R, p_want, Lbox = 1.5, 0.5, 32.0
    V1 = 4 / 3 * math.pi * R ** 3
    rho = -math.log(p_want) / V1
    rng = np.random.default_rng(2)
    n = rng.poisson(rho * Lbox ** 3)
    ps = ParticleSet(rng.random((n, 3)) * Lbox, np.full(n, R), [1.0, 0, 0, 0],
                     Box((0, 0, 0), (Lbox,) * 3, periodic=True), kind="spheres")
    g = ps.rasterize(0.2)
    phi = np.count_nonzero(g.labels == SOLID) / g.labels.size
    assert 1 - phi == pytest.approx(p_want, abs=0.02)
    cor = two_point_correlation(g, [SOLID], r_max=4.5)

    def s2_solid(r):
        r = np.minimum(r, 2 * R)
        lens = V1 * (1 - 3 * r / (4 * R) + r ** 3 / (16 * R ** 3))
        return 1 - 2 * p_want + np.exp(-rho * (2 * V1 - lens))

    sel = (cor.r >= 0.5) & (cor.r <= 4.0)
    assert np.abs(cor.s2[sel] - s2_solid(cor.r[sel])).max() < 0.02


def test_layered_particles_stacking_and_interlayer():
    """Layered particles (discs of N layers, random orientations and offsets) converted to
    prisms: every prism's stacking number is its particle's N, and the interlayer voxel
    volume at the default voxel equals sum (N - 1) (repeat - thickness) pi a b (the
    construction's ground truth, elementary geometry) within 1.5 %."""
    rng = np.random.default_rng(4)
    n = 8
    idx = np.argwhere(np.ones((2, 2, 2)))
    c = (idx + 0.5) * 12.0 + rng.uniform(-0.5, 0.5, (n, 3))
    ab = rng.uniform(2.0, 4.0, (n, 2))
    nl = rng.integers(2, 7, n)
    s = layered_structure(c, ab, nl, random_quaternions(n, 9), Box((0, 0, 0), (24, 24, 24)))
    st = stacking(s)
    assert np.array_equal(st.stacking_number, nl[s.columns["particle"]])
    assert st.n_stacks == n
    g = classify(s, None, graph=st.graph)
    vol = np.count_nonzero(g.labels == INTERLAYER) * g.voxel_volume
    want = float(((nl - 1) * (1.4 - 0.7) * math.pi * ab[:, 0] * ab[:, 1]).sum())
    assert vol == pytest.approx(want, rel=0.015)


def test_packing_generator_fraction_and_no_overlap():
    """The packing generator at target 0.55 in a periodic box: the spheres do not overlap
    (scipy cKDTree, periodic minimum image), the exact fraction is the target within 0.2 %,
    and the voxel solid fraction of the packing at 0.1 nm agrees with it within 0.5 %
    (voxel-centre sampling)."""
    box = Box((0, 0, 0), (14, 14, 14), periodic=True)
    res = pack_particles(box, 0.55, radius="lognormal:1.2,0.2", seed=3)
    ps = res.particles
    x, r = ps.centers, ps.semi_axes[:, 0]
    assert res.sphere_fraction == pytest.approx(0.55, rel=0.002)
    tree = cKDTree(x, boxsize=box.lengths)
    pairs = tree.query_pairs(2 * r.max(), output_type="ndarray")
    d = box.minimum_image(x[pairs[:, 1]] - x[pairs[:, 0]])
    assert np.all(np.linalg.norm(d, axis=1) >= r[pairs[:, 0]] + r[pairs[:, 1]])
    g = ps.rasterize(0.1)
    vox = np.count_nonzero(g.labels == SOLID) / g.labels.size
    assert vox == pytest.approx(ps.volume / box.volume, rel=0.005)


def test_periodic_exact_chords_lineal_fraction():
    """Exact chords through the spheres of a periodic packing (particles crossing the box
    faces enter through their periodic images): the total solid chord length over the total
    line length is the volume fraction (Rosiwal's lineal analysis, 1898; Underwood 1970,
    Quantitative Stereology, L_L = V_V), within 4 SE of the per-line fractions."""
    box = Box((0, 0, 0), (12, 12, 12), periodic=True)
    res = pack_particles(box, 0.45, radius="fixed:1.3", seed=8)
    ch = exact_chords(res.particles, 3000, seed=2)
    assert ch.method == "iur-periodic-particles"
    length = 4 * 12.0
    per_line = np.bincount(ch.line["solid"], weights=ch.lengths["solid"],
                           minlength=ch.n_lines) / length
    se = per_line.std() / math.sqrt(ch.n_lines)
    assert abs(per_line.mean() - res.sphere_fraction) < 4 * se + 1e-3


def test_layered_packing_ground_truth():
    """Layered-particle packing (periodic 24 nm box): every prism corner lies within its
    particle's sphere and the spheres do not overlap (scipy cKDTree), so particles never
    interpenetrate; the interlayer and solid voxel volumes at the default voxel match the
    generator's exact ground truth (prism volumes; per particle, consecutive layers' smaller
    area x gap) within 1.5 % (elementary geometry; voxel-centre sampling)."""
    box = Box((0, 0, 0), (24, 24, 24), periodic=True)
    res = pack_particles(box, 0.5, kind="layered", layers="uniform:2,5", lateral="fixed:5",
                         seed=6)
    s, sph = res.structure, res.particles
    r = sph.semi_axes[:, 0]
    pid = s.columns["particle"]
    d = box.minimum_image(s.prism_corners() - sph.centers[pid][:, None, :])
    assert np.all(np.linalg.norm(d, axis=2) <= r[pid][:, None] * (1 + 1e-12))
    tree = cKDTree(sph.centers, boxsize=box.lengths)
    pairs = tree.query_pairs(2 * r.max(), output_type="ndarray")
    dd = box.minimum_image(sph.centers[pairs[:, 1]] - sph.centers[pairs[:, 0]])
    assert np.all(np.linalg.norm(dd, axis=1) >= r[pairs[:, 0]] + r[pairs[:, 1]])
    st = stacking(s)
    assert np.array_equal(st.stacking_number, res.table["layers"][pid])
    g = classify(s, None, graph=st.graph)
    v = g.voxel_volume
    assert np.count_nonzero(g.labels == INTERLAYER) * v == pytest.approx(res.interlayer_volume,
                                                                          rel=0.015)
    assert np.count_nonzero(g.labels == SOLID) * v == pytest.approx(res.solid_volume, rel=0.015)
