"""Virtual sections and projections against stereology and closed forms.

* Cavalieri's principle: the integral of the projected solid thickness over the image equals
  the solid volume (Cavalieri 1635; Howard & Reed, Unbiased Stereology, 2nd ed., 2005, ch. 2).
  Reference volumes come from manifold3d (exact mesh booleans: the union of the prisms,
  intersected with the slab or the sphere), never from this program.
* A flat sheet of thickness h tilted by theta from the viewing axis is crossed along h / cos(theta)
  (elementary geometry, common practice).
* Delesse's principle: the expected area fraction of a phase on sections equals its volume
  fraction (Delesse 1847; Howard & Reed 2005, ch. 3).
* A Gaussian of full width at half maximum F has sigma = F / (2 sqrt(2 ln 2)); a blurred step
  rises from 10 % to 90 % over 2 x 1.2816 sigma (normal distribution quantiles, common practice).

Projections are taken at the DEFAULT pixel (about 512 across the domain) unless a test says
otherwise.
"""
import math

import numpy as np
import pytest
from scipy.spatial.transform import Rotation

from sheetview import Box, Sphere, Structure
from sheetview.grid import SOLID, PhaseGrid, rasterize
from sheetview.measures.sections import projection, section
from sheetview.synth import pack_stacks

#: Faces of a prism from its 6 corners (Structure.prism_corners: bottom a, b, c then top),
#: outward for a bottom face wound against the normal.
PRISM_FACES = np.array([[0, 2, 1], [3, 4, 5], [0, 1, 4], [0, 4, 3], [1, 2, 5], [1, 5, 4],
                        [2, 0, 3], [2, 3, 5]], dtype=np.uint64)


def manifold_volume(structure, clip=None) -> float:
    """Exact volume of the union of the prisms (manifold3d batch union), optionally
    intersected with the manifold ``clip``."""
    import manifold3d as m3d
    parts = []
    for c in structure.prism_corners():
        man = m3d.Manifold(m3d.Mesh64(np.ascontiguousarray(c, dtype=np.float64), PRISM_FACES))
        assert man.volume() > 0, "prism mesh must be an outward oriented manifold"
        parts.append(man)
    u = m3d.Manifold.batch_boolean(parts, m3d.OpType.Add)
    if clip is not None:
        u = u ^ clip
    return float(u.volume())


def _slab_box(p, a, lo=(0, 0, 0), hi=(24, 24, 24)):
    import manifold3d as m3d
    lo = np.array(lo, float)
    hi = np.array(hi, float)
    lo[a], hi[a] = p.slab
    return m3d.Manifold.cube(tuple(hi - lo)).translate(tuple(lo))


def _integral(p):
    return float(p.thickness.astype(float).sum()) * p.pixel ** 2


@pytest.fixture(scope="module")
def packed():
    return pack_stacks(Box((0, 0, 0), (24, 24, 24)), 25, lateral_size="fixed:5", layers="fixed:3",
                       seed=4).structure


def test_cavalieri_projection_integral_is_the_solid_volume(packed):
    """sum(t) * pixel^2 = the prisms' union volume (manifold3d) to 1e-6 along each axis at
    the default pixel, for non-overlapping randomly oriented stacks inside the box, and
    equal to the sum of the prism volumes (they do not overlap) (Cavalieri)."""
    V = manifold_volume(packed)
    assert V == pytest.approx(float(packed.volumes.sum()), rel=1e-9)
    for axis in "xyz":
        p = projection(packed, axis)
        assert p.pixel == 0.05
        assert _integral(p) == pytest.approx(V, rel=1e-6), axis


@pytest.mark.parametrize("axis,slab,offset", [("z", 6.0, 2.0), ("x", 3.3, -4.1), ("y", 7.7, 0.35)])
def test_slab_projection_integral_is_the_clipped_volume(packed, axis, slab, offset):
    """A slab's integral equals the prisms' volume inside the slab: manifold3d intersection of
    their union with the slab's box, to 1e-6 (Cavalieri); prisms cut by the slab faces are
    clipped exactly."""
    p = projection(packed, axis, slab, offset=offset)
    ref = manifold_volume(packed, _slab_box(p, "xyz".index(axis)))
    assert _integral(p) == pytest.approx(ref, rel=1e-6)


def _one_prism(kind, rng, L=30.0):
    """A prism of thickness 0.7 nm on a random triangle (edges 1 to 3 nm, angles >= 25 deg)
    at a random position: face-on (normal along z), edge-on (normal perpendicular to z) or
    randomly oriented."""
    while True:
        e = rng.uniform(1.0, 3.0, 2)
        ang = rng.uniform(math.radians(25), math.radians(130))
        tri = np.array([[0, 0, 0], [e[0], 0, 0], [e[1] * math.cos(ang), e[1] * math.sin(ang), 0]])
        a, b, c = tri
        angs = [np.degrees(np.arccos(np.clip(np.dot(q - p, r - p) / np.linalg.norm(q - p)
                                             / np.linalg.norm(r - p), -1, 1)))
                for p, q, r in ((a, b, c), (b, c, a), (c, a, b))]
        if min(angs) >= 25:
            break
    tri = tri - tri.mean(axis=0)
    spin = Rotation.from_euler("z", rng.uniform(0, 360), degrees=True)
    if kind == "face-on":
        rot = spin
    elif kind == "edge-on":
        rot = (Rotation.from_euler("z", rng.uniform(0, 360), degrees=True)
               * Rotation.from_euler("x", 90, degrees=True) * spin)
    else:
        rot = Rotation.random(random_state=rng)
    v = rot.apply(tri) + L / 2 + rng.uniform(-3, 3, 3)
    return Structure(v[None], 0.7, Box((0, 0, 0), (L, L, L)))


@pytest.mark.parametrize("kind", ["edge-on", "face-on", "random"])
def test_cavalieri_single_prisms_any_orientation(kind):
    """One prism at a time (30 each, random sub-pixel positions) seen edge-on, face-on or at a
    random orientation, at the default pixel (0.1 nm here, the prism 0.7 nm thick): the
    integral is the prism's volume (area x thickness, closed form) to 1e-6 (Cavalieri).
    Sampling each pixel's path at its centre erred by 12.7 % rms edge-on."""
    rng = np.random.default_rng({"edge-on": 1, "face-on": 2, "random": 3}[kind])
    for _ in range(30):
        s = _one_prism(kind, rng)
        p = projection(s, "z")
        assert p.pixel == 0.1
        assert _integral(p) == pytest.approx(float(s.volumes[0]), rel=1e-6)


def _random_prisms(n, L, seed):
    rng = np.random.default_rng(seed)
    c = rng.uniform(1.0, L - 1.0, (n, 3))
    tri = np.concatenate([rng.uniform(-1, 1, (n, 3, 2)), np.zeros((n, 3, 1))], axis=2)
    v = np.einsum("nab,nkb->nka", Rotation.random(n, random_state=rng).as_matrix(), tri)
    return Structure(v + c[:, None, :], rng.uniform(0.3, 0.8, n), Box((0, 0, 0), (L, L, L)))


@pytest.mark.parametrize("seed", [0, 1])
def test_cavalieri_overlapping_random_prisms(seed):
    """1,500 random prisms in a 10 nm box overlap (their volumes sum to some 22 % over the
    union): the integral at the default pixel equals the union volume (manifold3d) within
    0.1 %. Overlaps are counted once along each pixel's centre line (a point sample of the
    overlap in the pixel), so the residual is sampling noise that shrinks with the pixel."""
    s = _random_prisms(1500, 10.0, seed)
    V = manifold_volume(s)
    assert float(s.volumes.sum()) > 1.15 * V
    for axis in "xz":
        assert _integral(projection(s, axis)) == pytest.approx(V, rel=1e-3), axis


def test_cavalieri_sheets_crossing_a_sphere_wall():
    """Large tilted sheets filling a sphere domain, cut by its wall: the integral equals the
    union of the prisms intersected with the ball (manifold3d, 1,024 segments) within 0.1 %
    at the default pixel and at 0.1 nm (the wall cuts each column at the chord through the
    pixel's centre: the only approximation)."""
    import manifold3d as m3d
    R = 5.0
    rng = np.random.default_rng(0)
    rot = Rotation.random(random_state=rng)
    tris = []
    for z in np.arange(-4.2, 4.3, 1.4) + rng.uniform(0, 1.4):
        q = np.array([[-7, -7, z], [7, -7, z], [7, 7, z], [-7, 7, z]], float)
        tris += [q[[0, 1, 2]], q[[0, 2, 3]]]
    v = rot.apply(np.array(tris).reshape(-1, 3)).reshape(-1, 3, 3)
    s = Structure(v, 0.7, Sphere((0, 0, 0), R))
    V = manifold_volume(s, m3d.Manifold.sphere(R, 1024))
    for axis in "xz":
        for pixel in (None, 0.1):
            assert _integral(projection(s, axis, pixel=pixel)) == pytest.approx(V, rel=1e-3)


def test_cavalieri_periodic_box_wraps():
    """A prism crossing the faces (and edges) of a periodic box appears wrapped: the integral
    along each axis is its volume, area x thickness, to 1e-6 (Cavalieri; closed form)."""
    rng = np.random.default_rng(1)
    for _ in range(10):
        tri = np.c_[rng.uniform(-1.5, 1.5, (3, 2)), np.zeros(3)]
        v = Rotation.random(random_state=rng).apply(tri) + rng.uniform(-0.5, 0.5, 3)
        s = Structure(v[None], 0.6, Box((0, 0, 0), (10, 10, 10), periodic=True))
        for axis in "xyz":
            assert _integral(projection(s, axis)) == pytest.approx(float(s.volumes[0]), rel=1e-6)


def test_grid_projection_is_area_weighted():
    """A phase grid with unequal voxel edges (0.1, 0.15, 0.2 nm) projected along each axis at
    its default pixel and at 0.07 and 0.33 nm: the integral equals the solid voxel volume
    (count x voxel volume), and through a slab whose faces cut voxel layers in half, the
    solid volume of the whole layers plus half of each cut layer (Cavalieri on the voxel
    model), to 1e-6 (the picture stores float32)."""
    rng = np.random.default_rng(4)
    lab = np.where(rng.random((30, 24, 18)) < 0.3, SOLID, 3).astype(np.uint8)
    sp = (0.1, 0.15, 0.2)
    g = PhaseGrid(lab, sp)
    vol = float((lab == SOLID).sum()) * np.prod(sp)
    for axis in "xyz":
        for pixel in (None, 0.07, 0.33):
            p = projection(g, axis, pixel=pixel)
            assert _integral(p) == pytest.approx(vol, rel=1e-6), (axis, pixel)
    # slab along z from the middle of layer 3 to the middle of layer 11 (edge 0.2 nm)
    p = projection(g, "z", 1.6, offset=(3.5 + 11.5) / 2 * 0.2 - 0.5 * 18 * 0.2, pixel=0.07)
    k = (lab == SOLID).sum(axis=(0, 1)) * sp[0] * sp[1] * sp[2]
    ref = k[4:11].sum() + 0.5 * (k[3] + k[11])
    assert _integral(p) == pytest.approx(float(ref), rel=1e-6)


@pytest.mark.parametrize("theta_deg", [0.0, 30.0, 55.0])
def test_tilted_sheet_path_length(theta_deg):
    """Inside its footprint a sheet of thickness h tilted by theta is crossed along
    h / cos(theta) (closed form) to 1e-5 nm (the picture stores float32)."""
    h = 0.6
    th = math.radians(theta_deg)
    n = np.array([math.sin(th), 0.0, math.cos(th)])
    e1 = np.array([math.cos(th), 0.0, -math.sin(th)])
    e2 = np.array([0.0, 1.0, 0.0])
    c = np.array([10.0, 10.0, 10.0])
    L = 6.0
    tri = np.array([[c - L * e1 - L * e2, c + L * e1 - L * e2, c + L * e1 + L * e2],
                    [c - L * e1 - L * e2, c + L * e1 + L * e2, c - L * e1 + L * e2]])
    s = Structure(tri, h, Box((0, 0, 0), (20, 20, 20)))
    assert np.allclose(np.abs(s.normals @ n), 1.0)  # the sheet is tilted as intended
    p = projection(s, "z", pixel=0.25)
    # pixels well inside the footprint (away from the side faces by h tan(theta) + a pixel)
    nr, nc = p.thickness.shape
    x = p.extent[0] + (np.arange(nc) + 0.5) * p.pixel
    y = p.extent[3] - (np.arange(nr) + 0.5) * p.pixel
    X, Y = np.meshgrid(x, y)
    inner = (np.abs(X - 10) < L * math.cos(th) - h * math.tan(th) - 0.5) & (np.abs(Y - 10) < L - 0.5)
    assert inner.sum() > 100
    np.testing.assert_allclose(p.thickness[inner], h / math.cos(th), atol=1e-5)
    far = (np.abs(X - 10) > L + 1) | (np.abs(Y - 10) > L + 1)
    assert np.all(p.thickness[far] == 0)


def test_delesse_area_fraction_of_random_sections(packed):
    """The mean solid area fraction of 40 isotropic random sections (valid pixels, grid at
    0.1 nm) equals the grid's solid volume fraction within 4 standard errors (Delesse)."""
    g = rasterize(packed, 0.1)
    vv = float((g.labels == SOLID).mean())
    rng = np.random.default_rng(11)
    fr = []
    for _ in range(40):
        nrm = rng.normal(size=3)
        nrm /= np.linalg.norm(nrm)
        half = 0.5 * float(np.abs(nrm) @ np.array([24.0, 24.0, 24.0]))
        # offsets uniform along the normal over the box's extent: uniform random planes
        while True:
            off = rng.uniform(-half, half)
            img = section(packed, nrm, off, grid=g)
            if img.valid.sum() > 500:
                break
        fr.append((img.labels[img.valid] == SOLID).mean())
        # weight by valid area: planes meet the box in pieces of unequal area
        fr[-1] = (fr[-1], img.valid.sum())
    a = np.array([f for f, _ in fr])
    w = np.array([n for _, n in fr], float)
    mean = float((a * w).sum() / w.sum())
    se = float(np.std(a) / math.sqrt(len(a)))
    assert abs(mean - vv) < 4 * se + 1e-3, (mean, vv, se)


def test_axis_section_reproduces_the_voxel_layer(packed):
    """An axis-aligned section through voxel centres is that layer of the grid, in picture
    order (rows = -y, cols = x for z) -- the orientation convention of the docs."""
    g = rasterize(packed, 0.2)
    k = 37
    zc = g.axis_centers(2)[k]
    img = section(packed, (0, 0, 1), zc - 12.0, grid=g)
    np.testing.assert_array_equal(img.labels, g.labels[:, :, k].T[::-1])


def test_blur_has_the_requested_fwhm():
    """The 10-90 % rise of a blurred straight sheet edge is 2 x 1.2816 x FWHM / 2.3548
    within 5 % (Gaussian quantiles, common practice)."""
    big = 30.0
    tri = np.array([[[0.0, -big, 5], [big, -big, 5], [big, big, 5]],
                    [[0.0, -big, 5], [big, big, 5], [0.0, big, 5]]])
    s = Structure(tri, 0.7, Box((-10, -10, 0), (10, 10, 10)))
    F = 2.0
    p = projection(s, "z", pixel=0.02, resolution=F, mfp=1.0)
    row = p.intensity[p.intensity.shape[0] // 2].astype(float)
    lo, hi = row.min(), row.max()
    frac = (hi - row) / (hi - lo)  # 0 outside the sheet (x < 0), 1 inside
    x = p.extent[0] + (np.arange(row.size) + 0.5) * p.pixel
    x10 = np.interp(0.1, frac, x)
    x90 = np.interp(0.9, frac, x)
    sigma = F / (2 * math.sqrt(2 * math.log(2)))
    assert (x90 - x10) == pytest.approx(2 * 1.2816 * sigma, rel=0.05)


def test_sphere_domain_clips_paths_and_marks_valid():
    """In a sphere of radius R the valid pixels form the disc of radius R (pixel-centre
    test), and no path exceeds the chord 2 sqrt(R^2 - r^2) (closed form)."""
    R = 8.0
    res = pack_stacks(Sphere((0, 0, 0), R), 20, lateral_size="fixed:4", layers="fixed:2", seed=2)
    p = projection(res.structure, "z", pixel=0.1)
    nr, nc = p.thickness.shape
    x = p.extent[0] + (np.arange(nc) + 0.5) * p.pixel
    y = p.extent[3] - (np.arange(nr) + 0.5) * p.pixel
    X, Y = np.meshgrid(x, y)
    r2 = X ** 2 + Y ** 2
    np.testing.assert_array_equal(p.valid, r2 < R * R)
    chord = 2 * np.sqrt(np.clip(R * R - r2, 0, None))
    assert np.all(p.thickness <= chord + 1e-6)
