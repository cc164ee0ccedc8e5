"""Virtual sections and projections against stereology and closed forms.

* Cavalieri's principle: the integral of the projected solid thickness over the image equals
  the solid volume (Cavalieri 1635; Howard & Reed, Unbiased Stereology, 2nd ed., 2005, ch. 2).
* A flat sheet of thickness h tilted by theta from the viewing axis is crossed along h / cos(theta)
  (elementary geometry, common practice).
* Delesse's principle: the expected area fraction of a phase on sections equals its volume
  fraction (Delesse 1847; Howard & Reed 2005, ch. 3).
* A Gaussian of full width at half maximum F has sigma = F / (2 sqrt(2 ln 2)); a blurred step
  rises from 10 % to 90 % over 2 x 1.2816 sigma (normal distribution quantiles, common practice).
"""
import math

import numpy as np
import pytest

from sheetview import Box, Sphere, Structure
from sheetview.grid import SOLID, rasterize
from sheetview.measures.sections import projection, section
from sheetview.synth import pack_stacks


@pytest.fixture(scope="module")
def packed():
    return pack_stacks(Box((0, 0, 0), (24, 24, 24)), 25, lateral_size="fixed:5", layers="fixed:3",
                       seed=4).structure


def test_cavalieri_projection_integral_is_the_solid_volume(packed):
    """sum(t) * pixel^2 = sum of prism volumes (area x thickness) within 0.3 %, along each axis,
    for non-overlapping randomly oriented stacks inside the box (Cavalieri)."""
    V = float(packed.volumes.sum())
    for axis in "xyz":
        p = projection(packed, axis, pixel=0.04)
        integral = float(p.thickness.astype(float).sum()) * p.pixel ** 2
        assert integral == pytest.approx(V, rel=3e-3), axis


def test_slab_projection_integral_matches_clipped_volume(packed):
    """A slab's integral equals the solid volume inside the slab, measured independently by a
    fine voxel count of the same prisms (Cavalieri; rasterization at 0.05 nm, tolerance 1 %)."""
    p = projection(packed, "z", 6.0, offset=2.0, pixel=0.05)
    g = rasterize(packed, 0.05)
    zc = g.axis_centers(2)
    sel = (zc >= p.slab[0]) & (zc < p.slab[1])
    v_grid = float((g.labels[:, :, sel] == SOLID).sum()) * 0.05 ** 3
    integral = float(p.thickness.astype(float).sum()) * p.pixel ** 2
    assert integral == pytest.approx(v_grid, rel=0.01)


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
