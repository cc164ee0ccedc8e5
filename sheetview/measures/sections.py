"""Virtual micrographs: phase sections of any plane and transmission-like projections.

*Section*: the phase map (solid, interlayer, gel pore, outside) on the plane through
``centre + offset * n`` with unit normal ``n``, sampled from the phase grid by nearest
voxel (:func:`sample_section`); ``centre`` is the domain's centre.

*Projection*: the solid thickness ``t(x, y)`` crossed by a straight path along an axis
through a slab of the structure, and the transmitted fraction ``exp(-t / lambda)`` (the
Beer-Lambert form used for mass-thickness contrast in transmission electron microscopy,
e.g. Williams & Carter, *Transmission Electron Microscopy*, 2nd ed., 2009, ch. 22: common
practice), optionally blurred by a Gaussian whose full width at half maximum is the
instrument resolution. Each pixel holds the solid path length averaged over the pixel's
area: the solid volume in the pixel's column (within the slab) divided by the pixel area,
so that the sum over the picture times the pixel area is the solid volume in the slab
(Cavalieri) whatever the orientation of the sheets. For prisms the column volumes are exact
(each prism a convex polyhedron, its faces' projections clipped to the pixel); overlapping
prisms are counted once along the pixel's centre line (a point sample of the overlap). For a
phase grid, solid voxels count with their overlap with the slab and the pixel (area-weighted
where pixel and voxel differ).

What these images are not: a simulation of electron optics (no phase contrast, defocus,
noise, damage or sample preparation). They show the geometry that a micrograph of this
structure could at best resolve; hold them against real micrographs with that in mind.

Images are arrays indexed ``[row, col]`` with ``row`` running down the picture: for an
axis-aligned normal the picture's right-hand axis and up axis follow
``plane_basis`` (``z``: right = x, up = y; ``x``: right = y, up = z;
``y``: right = z, up = x).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numba
import numpy as np

from ..domain import Box
from ..errors import OptionError, positive
from ..grid import GEL, INTERLAYER, OUTSIDE, SOLID, PhaseGrid
from ..grid import PHASE_NAMES as NAME_OF
from ..particles import ParticleSet
from ..structure import Structure, SurfaceBody
from ..threads import budget as thread_budget
from ..threads import run_chunks
from ._rays import domain_interval, periodic_images, prism_planes, push, regroup

AXES = {"x": 0, "y": 1, "z": 2}
PHASE_NAMES = {"solid": SOLID, "interlayer": INTERLAYER, "gel": GEL}
#: Largest image side (pixels) any virtual micrograph may have.
MAX_SIDE = 8192
#: Default transmission length (nm) of exp(-t / lambda): a contrast scale of the order of
#: the inelastic mean free path of 200 keV electrons in light solids, some 100 nm (from
#: memory). It sets contrast only; set it for your instrument.
DEFAULT_MFP = 100.0


def parse_axis_or_normal(axis=None, normal=None):
    """Unit normal from ``axis`` ('x', 'y', 'z') or ``normal`` (three numbers, or a
    string 'a,b,c'); z when neither is given."""
    if axis is not None and normal is not None:
        raise OptionError("give the plane by --axis or by --normal, not both", field="normal")
    if normal is not None:
        return plane_basis(parse_vector(normal, "--normal"))[0]
    a = str(axis or "z").lower()
    if a not in AXES:
        raise OptionError(f"--axis must be x, y or z, got {axis!r}", field="axis")
    n = np.zeros(3)
    n[AXES[a]] = 1.0
    return n


def domain_centre_and_span(domain) -> tuple[np.ndarray, np.ndarray]:
    lo, hi = (np.asarray(b, float) for b in domain.bounds)
    return 0.5 * (lo + hi), hi - lo


def grid_centre_and_span(g) -> tuple[np.ndarray, np.ndarray]:
    span = np.asarray(g.shape) * np.asarray(g.spacing, float)
    return np.asarray(g.origin, float) + 0.5 * span, span


def centre_and_span(obj, grid=None) -> tuple[np.ndarray, np.ndarray]:
    """Centre and edge lengths of the sample: its domain's box, else (a voxel volume)
    the box of its grid."""
    dom = getattr(obj, "domain", None)
    if dom is not None:
        return domain_centre_and_span(dom)
    return grid_centre_and_span(grid if grid is not None else obj)


def _check_pixel(pixel, what="--pixel"):
    if pixel is None:
        return None
    return positive(pixel, what, field="pixel")


def _check_side(n_rows, n_cols, pixel):
    if max(n_rows, n_cols) > MAX_SIDE:
        raise OptionError(f"the image would be {n_cols} x {n_rows} pixels at {pixel:g} nm per pixel "
                          f"(largest side allowed {MAX_SIDE}); use a larger --pixel", field="pixel")


# ================================================================ plane sampling
def plane_basis(normal) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Unit normal ``n`` and in-plane axes ``u``, ``v`` with ``u x v = n``.

    For axis-aligned normals the in-plane axes are the other two axes in cyclic order
    (``z``: u = x, v = y; ``x``: u = y, v = z; ``y``: u = z, v = x), so that sections
    read like the panels of :func:`contact_sheet` up to a swap.
    """
    n = np.asarray(normal, dtype=float).reshape(3)
    norm = np.linalg.norm(n)
    if not (np.isfinite(norm) and norm > 0):
        raise OptionError("the plane normal must be a non-zero vector, got "
                          f"({', '.join(f'{x:g}' for x in n)})", param="slice_normal")
    n = n / norm
    a = int(np.argmax(np.abs(n)))
    if abs(abs(n[a]) - 1.0) < 1e-12:
        u = np.zeros(3)
        u[(a + 1) % 3] = 1.0
        u *= 1.0  # cyclic axis order
        v = np.cross(n, u)
        return n, u, v
    helper = np.zeros(3)
    helper[int(np.argmin(np.abs(n)))] = 1.0
    u = np.cross(helper, n)
    u /= np.linalg.norm(u)
    v = np.cross(n, u)
    return n, u, v


@dataclass
class Section:
    """Phase labels sampled on a plane.

    ``labels[a, b]`` is the phase of the voxel containing the point
    ``origin + (u0 + (a + 0.5) * pixel) * u + (v0 + (b + 0.5) * pixel) * v``;
    255 marks points off the grid.
    """

    labels: np.ndarray
    origin: np.ndarray
    normal: np.ndarray
    u: np.ndarray
    v: np.ndarray
    u0: float
    v0: float
    pixel: float

    OFF_GRID = 255

    def point(self, a, b) -> np.ndarray:
        """World coordinates (nm) of pixel centre(s) ``(a, b)``."""
        a = np.asarray(a, float)[..., None]
        b = np.asarray(b, float)[..., None]
        return (self.origin + (self.u0 + (a + 0.5) * self.pixel) * self.u
                + (self.v0 + (b + 0.5) * self.pixel) * self.v)

    def fractions(self) -> dict:
        """Area fraction of each phase on the grid part of the section."""
        lab = self.labels[self.labels != self.OFF_GRID]
        if lab.size == 0:
            return {}
        cnt = np.bincount(lab, minlength=4)
        return {NAME_OF.get(c, str(c)): float(cnt[c] / lab.size) for c in np.flatnonzero(cnt)}


def grid_bounds(grid) -> tuple[np.ndarray, np.ndarray]:
    lo = np.asarray(grid.origin, float)
    return lo, lo + np.asarray(grid.shape) * np.asarray(grid.spacing)


def sample_section(grid, origin, normal, *, pixel: float | None = None,
                   max_pixels: int = 800) -> Section:
    """Phase labels of ``grid`` on the plane through ``origin`` with ``normal``.

    Nearest-voxel lookup: each pixel takes the label of the voxel that contains its
    centre. The pixel is the smallest voxel edge (enlarged if the section would exceed
    ``max_pixels`` per side); the sampled patch is the projection of the grid's box onto
    the plane.
    """
    n, u, v = plane_basis(normal)
    o = np.asarray(origin, dtype=float).reshape(3)
    lo, hi = grid_bounds(grid)
    corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1])
                        for z in (lo[2], hi[2])]) - o
    pu, pv_ = corners @ u, corners @ v
    sp = np.asarray(grid.spacing, float)
    px = float(sp.min()) if pixel is None else float(pixel)
    span = max(pu.max() - pu.min(), pv_.max() - pv_.min())
    if span / px > max_pixels:
        px = span / max_pixels
    u0, v0 = float(pu.min()), float(pv_.min())
    nu = max(1, int(math.ceil((pu.max() - u0) / px - 1e-9)))
    nv = max(1, int(math.ceil((pv_.max() - v0) / px - 1e-9)))
    a = u0 + (np.arange(nu) + 0.5) * px
    b = v0 + (np.arange(nv) + 0.5) * px
    labels = np.full((nu, nv), Section.OFF_GRID, np.uint8)
    for j0 in range(0, nu, 256):  # blocks keep the temporaries small
        pts = o + a[j0:j0 + 256, None, None] * u + b[None, :, None] * v
        idx = np.floor((pts - lo) / sp).astype(np.int64)
        ok = np.all((idx >= 0) & (idx < np.asarray(grid.shape)), axis=-1)
        blk = labels[j0:j0 + 256]
        ii = idx[ok]
        blk[ok] = grid.labels[ii[:, 0], ii[:, 1], ii[:, 2]]
    return Section(labels, o, n, u, v, u0, v0, px)



def parse_vector(v, what):
    """Three finite numbers from ``"0,0,1"`` or a sequence (``what`` names the parameter)."""
    if isinstance(v, str):
        parts = v.replace(" ", "").split(",")
    else:
        parts = list(v)
    try:
        out = np.array([float(x) for x in parts])
    except ValueError:
        raise OptionError(f"{what}: expected three numbers such as 0,0,1, got {v!r}") from None
    if out.shape != (3,) or not np.all(np.isfinite(out)):
        raise OptionError(f"{what}: expected three finite numbers such as 0,0,1, got {v!r}")
    return out



# ===================================================================== sections
@dataclass
class SectionImage:
    """A phase section as a picture: ``labels[row, col]`` (phase codes; 255 off the grid).

    ``right``, ``up``: unit vectors of the picture's axes in the world; the centre of
    pixel ``(r, c)`` is ``corner + (c + 0.5) * pixel * right - (r + 0.5) * pixel * up``
    where ``corner`` is the world position of the picture's top-left corner.
    """

    labels: np.ndarray
    pixel: float
    normal: np.ndarray
    right: np.ndarray
    up: np.ndarray
    origin: np.ndarray
    offset: float
    corner: np.ndarray
    names: dict
    voxel: float
    notes: list = field(default_factory=list)

    OFF_GRID = 255

    @property
    def valid(self) -> np.ndarray:
        """Pixels inside the sample (on the grid, not outside the domain)."""
        return (self.labels != self.OFF_GRID) & (self.labels != OUTSIDE)

    def mask(self, phases=("solid", "interlayer")) -> np.ndarray:
        """True where the pixel's phase is one of ``phases`` (names or codes)."""
        codes = [PHASE_NAMES.get(p, p) if isinstance(p, str) else int(p) for p in phases]
        return np.isin(self.labels, np.asarray(codes, np.uint8))

    def fractions(self) -> dict:
        """Area fraction of each phase over the valid pixels."""
        lab = self.labels[self.valid]
        if lab.size == 0:
            return {}
        cnt = np.bincount(lab, minlength=256)
        return {self.names.get(c, str(c)): float(cnt[c] / lab.size) for c in np.flatnonzero(cnt)}

    def to_dict(self) -> dict:
        return {"kind": "section", "normal": self.normal.tolist(), "offset_nm": self.offset,
                "origin_nm": self.origin.tolist(), "corner_nm": self.corner.tolist(),
                "right": self.right.tolist(),
                "up": self.up.tolist(), "pixel_nm": self.pixel, "voxel_nm": self.voxel,
                "shape_rows_cols": list(self.labels.shape),
                "valid_pixels": int(self.valid.sum()), "area_fractions": self.fractions(),
                "notes": list(self.notes)}


def _grid_of(obj, grid):
    """The phase grid to sample: ``grid`` when given, else ``obj`` itself if it is one."""
    if grid is not None:
        return grid
    if isinstance(obj, PhaseGrid):
        return obj
    raise OptionError(f"a {type(obj).__name__} needs its phase grid (grid=...): build it with "
                      "sheetview.app.run.phase_grid, as `measure` does", param="grid")


def section(obj, normal=(0.0, 0.0, 1.0), offset: float = 0.0, *, pixel: float | None = None,
            grid: PhaseGrid | None = None) -> SectionImage:
    """The phase section of ``obj`` (Structure, SurfaceBody or PhaseGrid) on the plane
    with ``normal`` at signed distance ``offset`` (nm) from the domain's centre.

    ``grid`` is the phase grid of ``obj`` (needed unless ``obj`` is one;
    :func:`sheetview.app.run.phase_grid` builds it as ``measure`` does). ``pixel``
    defaults to the grid's voxel edge. The picture covers the projection of the grid's box
    onto the plane; pixels off the grid are 255.
    """
    pixel = _check_pixel(pixel)
    off = float(offset)
    if not math.isfinite(off):
        raise OptionError(f"must be a finite length in nm, got {offset!r}", param="offset")
    g = _grid_of(obj, grid)
    n, u, v = plane_basis(normal)
    centre, span = centre_and_span(obj, g)
    half = 0.5 * float(np.abs(span) @ np.abs(n))
    notes = []
    if abs(off) > half:
        raise OptionError(f"<<offset>> {off:g} nm puts the plane outside the sample (it spans "
                          f"{-half:.3g} to {half:.3g} nm along the normal)", field="offset")
    origin = centre + off * n
    voxel = float(np.min(g.spacing))
    px = voxel if pixel is None else pixel
    lo = np.asarray(g.origin, float)
    corners = np.array([[x, y, z] for x in (0, 1) for y in (0, 1) for z in (0, 1)], float)
    corners = lo + corners * np.asarray(g.shape) * np.asarray(g.spacing) - origin
    nu = int(math.ceil(np.ptp(corners @ u) / px - 1e-9))
    nv = int(math.ceil(np.ptp(corners @ v) / px - 1e-9))
    _check_side(nv, nu, px)
    sec = sample_section(g, origin, n, pixel=px, max_pixels=MAX_SIDE)
    if px > 1.5 * voxel:
        notes.append(f"pixel {px:g} nm is coarser than the voxel {voxel:g} nm: each pixel "
                     "shows the voxel at its centre (no averaging)")
    if px < 0.75 * voxel:
        notes.append(f"pixel {px:g} nm is finer than the voxel {voxel:g} nm: the picture "
                     "cannot resolve more than the grid does")
    labels = np.ascontiguousarray(sec.labels.T[::-1])  # rows = -v (down), cols = u
    if not ((labels != SectionImage.OFF_GRID) & (labels != OUTSIDE)).any():
        raise OptionError(f"the plane at offset {off:g} nm meets no voxel inside the sample "
                          f"(pixel {px:g} nm): move the plane inward or use a smaller <<pixel>>")
    top_left = sec.origin + sec.u0 * sec.u + (sec.v0 + labels.shape[0] * sec.pixel) * sec.v
    return SectionImage(labels, float(sec.pixel), n, u, v, origin, off, top_left, dict(g.names),
                        voxel, notes)


# ================================================================== projections
@dataclass
class ProjectionImage:
    """A transmission-like projection: ``thickness[row, col]`` (nm of solid crossed),
    ``intensity = exp(-thickness / mfp)`` blurred to ``resolution``, ``valid`` (the path
    meets the sample)."""

    thickness: np.ndarray
    intensity: np.ndarray
    valid: np.ndarray
    pixel: float
    axis: str
    slab: tuple
    mfp: float
    resolution: float
    right: str
    up: str
    extent: tuple
    method: str
    notes: list = field(default_factory=list)

    def to_dict(self) -> dict:
        t = self.thickness[self.valid]
        return {"kind": "projection", "axis": self.axis, "slab_nm": list(self.slab),
                "slab_thickness_nm": self.slab[1] - self.slab[0], "pixel_nm": self.pixel,
                "mfp_nm": self.mfp, "resolution_fwhm_nm": self.resolution, "right": self.right,
                "up": self.up, "extent_nm": list(self.extent), "method": self.method,
                "shape_rows_cols": list(self.thickness.shape),
                "valid_pixels": int(self.valid.sum()),
                "mean_thickness_nm": float(t.mean()) if t.size else None,
                "max_thickness_nm": float(t.max()) if t.size else None,
                "covered_fraction": float((t > 0).mean()) if t.size else None,
                "notes": list(self.notes)}


def _picture_axes(a: int) -> tuple[int, int]:
    """(right, up) world axes of a projection along axis ``a`` (as plane_basis)."""
    return (a + 1) % 3, (a + 2) % 3


def projection(obj, axis: str = "z", slab: float | None = None, *, offset: float = 0.0,
               pixel: float | None = None, mfp: float = DEFAULT_MFP, resolution: float = 0.0,
               grid: PhaseGrid | None = None) -> ProjectionImage:
    """Project ``obj`` along ``axis`` through a slab of thickness ``slab`` (nm; default the
    whole domain) centred ``offset`` nm from the domain's centre.

    Each pixel is the mean solid path length over its area (column volume / pixel area).
    Prisms: exact column volumes, clipped to the slab and to the domain's chord through the
    pixel centre; overlaps counted once along the centre line. Closed bodies and phase
    grids: the voxel model's solid volume per column, area-weighted onto the pixels
    (``pixel`` default: the finer in-plane voxel edge; a closed body needs its phase grid,
    ``grid``, from :func:`sheetview.app.run.phase_grid`).
    """
    a = AXES.get(str(axis).lower())
    if a is None:
        raise OptionError(f"--axis must be x, y or z, got {axis!r}", field="axis")
    axis = "xyz"[a]
    pixel = _check_pixel(pixel)
    mfp = positive(mfp, "--mfp", field="mfp")
    resolution = float(resolution or 0.0)
    if not (math.isfinite(resolution) and resolution >= 0):
        raise OptionError(f"--resolution must be a length >= 0 nm, got {resolution!r}",
                          field="resolution")
    off = float(offset)
    if not math.isfinite(off):
        raise OptionError(f"must be a finite length in nm, got {offset!r}", param="offset")
    if slab is None and off != 0:
        raise OptionError("<<offset>> places a slab: give its thickness with <<slab>> (without it "
                          "the whole sample is projected)", field="offset")
    if isinstance(obj, Structure):
        g = None
        centre, span = centre_and_span(obj)
    elif isinstance(obj, (PhaseGrid, SurfaceBody, ParticleSet)):
        g = _grid_of(obj, grid)
        centre, span = grid_centre_and_span(g)
    else:
        raise OptionError(f"cannot project a {type(obj).__name__}")
    if resolution > 10 * float(span.max()):
        raise OptionError(f"--resolution {resolution:g} nm is over ten times the sample "
                          f"({float(span.max()):.4g} nm): the picture would be uniform",
                          field="resolution")
    if slab is None:
        z0, z1 = centre[a] - 0.5 * span[a], centre[a] + 0.5 * span[a]
    else:
        slab = positive(slab, "--slab", field="slab")
        z0, z1 = centre[a] + off - 0.5 * slab, centre[a] + off + 0.5 * slab
    if z1 <= centre[a] - 0.5 * span[a] or z0 >= centre[a] + 0.5 * span[a]:
        raise OptionError(f"the slab {z0:.4g} to {z1:.4g} nm along {axis} misses the sample "
                          f"({centre[a] - 0.5 * span[a]:.4g} to {centre[a] + 0.5 * span[a]:.4g} nm)",
                          field="offset")
    z0, z1 = max(z0, centre[a] - 0.5 * span[a]), min(z1, centre[a] + 0.5 * span[a])
    ra, ua = _picture_axes(a)
    lo_r, hi_r = centre[ra] - 0.5 * span[ra], centre[ra] + 0.5 * span[ra]
    lo_u, hi_u = centre[ua] - 0.5 * span[ua], centre[ua] + 0.5 * span[ua]
    notes = []
    if g is None:
        px = pixel if pixel is not None else _default_pixel(max(span[ra], span[ua]))
        nc = int(math.ceil((hi_r - lo_r) / px - 1e-9))
        nr = int(math.ceil((hi_u - lo_u) / px - 1e-9))
        _check_side(nr, nc, px)
        t, valid = _project_prisms(obj, a, ra, ua, lo_r, hi_u, px, nr, nc, z0, z1)
        method = "exact solid volume per pixel column through prisms"
    else:
        t, valid, px = _project_grid(g, a, z0, z1, pixel)
        nr, nc = t.shape
        method = "solid voxels along the path, area-weighted per pixel"
        vox = float(min(g.spacing[ra], g.spacing[ua]))
        if px < 0.75 * vox:
            notes.append(f"pixel {px:g} nm is finer than the voxel {vox:g} nm: the picture "
                         "cannot resolve more than the grid does")
    if not valid.any():
        raise OptionError(f"no pixel of the picture meets the sample (pixel {px:g} nm, sample "
                          f"{span[ra]:.4g} x {span[ua]:.4g} nm): use a smaller --pixel",
                          field="pixel")
    inten = np.exp(-t / mfp)
    if resolution > 0:
        from scipy.ndimage import gaussian_filter
        sigma = resolution / (2.0 * math.sqrt(2.0 * math.log(2.0))) / px
        # blur the transmitted fraction; outside the sample counts as fully transmitting
        inten = gaussian_filter(np.where(valid, inten, 1.0), sigma, mode="nearest")
        if sigma < 0.5:
            notes.append(f"resolution {resolution:g} nm is under a pixel ({px:g} nm): blur is slight")
    extent = (float(lo_r), float(lo_r + nc * px), float(hi_u - nr * px), float(hi_u))
    return ProjectionImage(t.astype(np.float32), inten.astype(np.float32), valid, float(px), axis,
                           (float(z0), float(z1)), mfp, resolution, "xyz"[ra], "xyz"[ua], extent,
                           method, notes)


def _default_pixel(span: float) -> float:
    """About 512 pixels across, rounded to 1, 2 or 5 x 10^k nm, at least 0.05 nm."""
    target = max(span / 512.0, 0.05)
    e = math.floor(math.log10(target))
    for m in (1.0, 2.0, 5.0, 10.0):
        if m * 10 ** e >= target * 0.999:
            return float(m * 10 ** e)
    return float(target)


def _project_prisms(s: Structure, a, ra, ua, left, top, px, nr, nc, z0, z1):
    """Solid path length per pixel averaged over the pixel's area: the volume of solid in
    the pixel's column (within the slab and the domain) divided by the pixel area.

    Each prism is a convex polyhedron: the path length through it is the height of its
    upper surface above its lower one, both piecewise linear over its footprint. The
    column volume is the sum over its faces, upper ones added and lower ones subtracted,
    of the integral of the face's height over its projection clipped to the pixel
    (polygon clipping, exact), the height clamped to the slab and the domain's chord at
    the pixel centre (the chord is the only approximation, at a sphere's wall). Overlaps:
    each pixel centre's path is clipped against the prisms' face planes (Cyrus-Beck) and
    its intervals merged; the length counted twice on that path is subtracted (exact when
    prisms do not overlap; a point sample of the overlap otherwise).
    Returns (thickness, valid)."""
    length = z1 - z0
    dom = s.domain
    rows, cols = np.mgrid[0:nr, 0:nc]
    o = np.zeros((nr * nc, 3))
    o[:, ra] = left + (cols.ravel() + 0.5) * px
    o[:, ua] = top - (rows.ravel() + 0.5) * px
    o[:, a] = z0
    u = np.zeros_like(o)
    u[:, a] = 1.0
    if isinstance(dom, Box) and dom.periodic:
        tlo = np.zeros(len(o))
        thi = np.full(len(o), length)
        v, nrm, th = periodic_images(s, dom)
    else:
        tlo, thi = domain_interval(dom, o, u, np.full(len(o), length))
        v, nrm, th = s.vertices, s.normals, s.thickness
    valid = thi > tlo
    del o, u, rows, cols
    t = np.zeros(nr * nc)
    if len(v):
        v = np.asarray(v, float)
        nrm = np.asarray(nrm, float)
        th = np.broadcast_to(np.asarray(th, float), (len(v),))
        off = np.abs(nrm) * (0.5 * th)[:, None]
        blo = v.min(axis=1) - off
        bhi = v.max(axis=1) + off
        keep = ((bhi[:, a] > z0) & (blo[:, a] < z1) & (bhi[:, ra] > left)
                & (blo[:, ra] < left + nc * px) & (bhi[:, ua] > top - nr * px) & (blo[:, ua] < top))
        idx = np.flatnonzero(keep)
        v, nrm, th, blo, bhi = v[idx], nrm[idx], np.ascontiguousarray(th[idx]), blo[idx], bhi[idx]
        # area-weighted column volumes of every prism, summed per pixel
        nparts = thread_budget()
        if nparts * nr * nc > 2 ** 26 or len(v) < 1000:
            nparts = 1  # per-part accumulators only while they stay small
        _area_columns(np.ascontiguousarray(v), np.ascontiguousarray(nrm), th, a, ra, ua,
                      left, top, px, nr, nc, z0, tlo, thi, t, nparts)
        # overlaps: the length counted twice along each pixel-centre path
        planes = prism_planes(v, nrm, th)
        c0 = np.maximum(np.ceil((blo[:, ra] - left) / px - 0.5), 0).astype(np.int64)
        c1 = np.minimum(np.floor((bhi[:, ra] - left) / px - 0.5), nc - 1).astype(np.int64)
        r0 = np.maximum(np.ceil((top - bhi[:, ua]) / px - 0.5), 0).astype(np.int64)
        r1 = np.minimum(np.floor((top - blo[:, ua]) / px - 0.5), nr - 1).astype(np.int64)
        keep = (c1 >= c0) & (r1 >= r0)
        idx = np.flatnonzero(keep)
        planes, c0, c1, r0, r1 = planes[idx], c0[idx], c1[idx], r0[idx], r1[idx]
        # row blocks bounding the number of intervals held at once
        # intervals per picture row: each prism adds its width to every row it spans
        d = np.zeros(nr + 1)
        np.add.at(d, r0, (c1 - c0 + 1).astype(float))
        np.add.at(d, r1 + 1, -(c1 - c0 + 1).astype(float))
        per_row = np.cumsum(d[:nr])
        budget = 4_000_000
        edges = [0]
        acc = 0.0
        for r in range(nr):
            acc += per_row[r]
            if acc > budget:
                edges.append(r + 1)
                acc = 0.0
        if edges[-1] != nr:
            edges.append(nr)
        double = np.zeros(nr * nc)
        for b0, b1 in zip(edges[:-1], edges[1:]):
            sel = np.flatnonzero((r1 >= b0) & (r0 < b1))
            if len(sel) == 0:
                continue
            il, is_, ie = _footprint_intervals(
                np.ascontiguousarray(planes[sel]), c0[sel], c1[sel], np.maximum(r0[sel], b0),
                np.minimum(r1[sel], b1 - 1), a, ra, ua, left, top, px, nc, z0, tlo, thi)
            _merge_lengths(il, is_, ie, double, 1e-9)
        t -= double
        np.maximum(t, 0.0, out=t)
        t[~valid] = 0.0
    return t.reshape(nr, nc), valid.reshape(nr, nc)


@numba.njit(cache=True)
def _clip_poly(xs, ys, n, ca, cb, cc, ox, oy):
    """Sutherland-Hodgman: the part of polygon ``(xs, ys)[:n]`` where
    ``ca x + cb y <= cc``, written to ``ox, oy``; returns its vertex count."""
    m = 0
    for i in range(n):
        j = i + 1 if i + 1 < n else 0
        fi = ca * xs[i] + cb * ys[i] - cc
        fj = ca * xs[j] + cb * ys[j] - cc
        if fi <= 0.0:
            ox[m] = xs[i]
            oy[m] = ys[i]
            m += 1
        if (fi < 0.0 < fj) or (fj < 0.0 < fi):
            q = fi / (fi - fj)
            ox[m] = xs[i] + q * (xs[j] - xs[i])
            oy[m] = ys[i] + q * (ys[j] - ys[i])
            m += 1
    return m


@numba.njit(cache=True)
def _poly_linear_integral(xs, ys, n, z0, gx, gy):
    """Integral of ``z0 + gx x + gy y`` over the polygon ``(xs, ys)[:n]`` (either winding
    gives the same sign convention: counter-clockwise positive; callers use |area|)."""
    A = 0.0
    Sx = 0.0
    Sy = 0.0
    for i in range(n):
        j = i + 1 if i + 1 < n else 0
        cr = xs[i] * ys[j] - xs[j] * ys[i]
        A += cr
        Sx += (xs[i] + xs[j]) * cr
        Sy += (ys[i] + ys[j]) * cr
    A *= 0.5
    Sx /= 6.0
    Sy /= 6.0
    return z0 * A + gx * Sx + gy * Sy


@numba.njit(cache=True)
def _clamped_integral(xs, ys, n, h0, gx, gy, lo, hi, bx, by, cx, cy):
    """Integral over the polygon ``(xs, ys)[:n]`` (counter-clockwise) of
    ``clamp(h0 + gx x + gy y, lo, hi)``; ``bx, by, cx, cy`` are scratch arrays."""
    zmin = 1e300
    zmax = -1e300
    for i in range(n):
        z = h0 + gx * xs[i] + gy * ys[i]
        zmin = min(zmin, z)
        zmax = max(zmax, z)
    if zmin >= hi:
        return hi * _poly_linear_integral(xs, ys, n, 1.0, 0.0, 0.0)
    if zmax <= lo:
        return lo * _poly_linear_integral(xs, ys, n, 1.0, 0.0, 0.0)
    total = _poly_linear_integral(xs, ys, n, h0, gx, gy)
    if zmax > hi:
        # minus the part above hi: (z - hi) over {z >= hi}, i.e. -gx x - gy y <= h0 - hi
        m = _clip_poly(xs, ys, n, -gx, -gy, h0 - hi, bx, by)
        if m >= 3:
            total -= _poly_linear_integral(bx, by, m, h0 - hi, gx, gy)
    if zmin < lo:
        # plus the part below lo: (lo - z) over {z <= lo}
        m = _clip_poly(xs, ys, n, gx, gy, lo - h0, cx, cy)
        if m >= 3:
            total += _poly_linear_integral(cx, cy, m, lo - h0, -gx, -gy)
    return total


@numba.njit(cache=True, nogil=True)
def _area_columns_parts(q0, q1, v, nrm, th, a, ra, ua, left, top, px, nr, nc, z0, tlo, thi,
                        acc, nparts):
    """Parts ``q0 <= q < q1`` of :func:`_area_columns`: prisms ``q n / nparts`` to
    ``(q + 1) n / nparts`` into their own accumulator ``acc[q]``."""
    n = v.shape[0]
    for q in range(q0, q1):
        _area_columns_range(v, nrm, th, a, ra, ua, left, top, px, nr, nc, z0, tlo, thi,
                            acc[q], q * n // nparts, (q + 1) * n // nparts)


def _area_columns(v, nrm, th, a, ra, ua, left, top, px, nr, nc, z0, tlo, thi, out, nparts):
    """Add to ``out[pixel]`` the volume of each prism inside the pixel's column between
    heights ``z0 + tlo`` and ``z0 + thi`` (per pixel), divided by the pixel area; the
    prisms in ``nparts`` parts run on threads, each with its own accumulator, added in
    part order."""
    n = v.shape[0]
    if nparts <= 1:
        _area_columns_parts(0, 1, v, nrm, th, a, ra, ua, left, top, px, nr, nc, z0, tlo, thi,
                            out.reshape(1, -1), 1)
        return
    acc = np.zeros((nparts, out.shape[0]))
    run_chunks(_area_columns_parts, nparts, v, nrm, th, a, ra, ua, left, top, px, nr, nc, z0,
               tlo, thi, acc, nparts)
    for q in range(nparts):
        out += acc[q]


@numba.njit(cache=True)
def _area_columns_range(v, nrm, th, a, ra, ua, left, top, px, nr, nc, z0, tlo, thi, out,
                        p_lo, p_hi):
    """Add to ``out[pixel]`` the volume of prisms ``p_lo:p_hi`` inside the pixel's column
    between heights ``z0 + tlo`` and ``z0 + thi`` (per pixel), divided by the pixel area.

    Divergence theorem over the prism: the column volume is the sum over faces of
    ``sign(n_a) * integral of clamp(z_face(x, y))`` over the face's projection clipped to
    the pixel square (faces parallel to the viewing axis contribute nothing)."""
    fx = np.empty(4)
    fy = np.empty(4)
    fz = np.empty(4)
    p1x = np.empty(16)
    p1y = np.empty(16)
    p2x = np.empty(16)
    p2y = np.empty(16)
    s1x = np.empty(16)
    s1y = np.empty(16)
    s2x = np.empty(16)
    s2y = np.empty(16)
    inv = 1.0 / (px * px)
    corner = np.empty((6, 3))
    for p in range(p_lo, p_hi):
        h = 0.5 * th[p]
        for k in range(3):
            for q in range(3):
                corner[k, q] = v[p, k, q] + h * nrm[p, q]
                corner[k + 3, q] = v[p, k, q] - h * nrm[p, q]
        cxm = (v[p, 0, 0] + v[p, 1, 0] + v[p, 2, 0]) / 3.0
        cym = (v[p, 0, 1] + v[p, 1, 1] + v[p, 2, 1]) / 3.0
        czm = (v[p, 0, 2] + v[p, 1, 2] + v[p, 2, 2]) / 3.0
        for f in range(5):
            # face vertices (outward normal nf)
            if f == 0:
                nv = 3
                nfx, nfy, nfz = nrm[p, 0], nrm[p, 1], nrm[p, 2]
                ids = (0, 1, 2, 0)
            elif f == 1:
                nv = 3
                nfx, nfy, nfz = -nrm[p, 0], -nrm[p, 1], -nrm[p, 2]
                ids = (3, 4, 5, 3)
            else:
                e = f - 2
                e1 = e + 1 if e < 2 else 0
                nv = 4
                ex = v[p, e1, 0] - v[p, e, 0]
                ey = v[p, e1, 1] - v[p, e, 1]
                ez = v[p, e1, 2] - v[p, e, 2]
                nfx = ey * nrm[p, 2] - ez * nrm[p, 1]
                nfy = ez * nrm[p, 0] - ex * nrm[p, 2]
                nfz = ex * nrm[p, 1] - ey * nrm[p, 0]
                if (nfx * (cxm - v[p, e, 0]) + nfy * (cym - v[p, e, 1])
                        + nfz * (czm - v[p, e, 2])) > 0.0:
                    nfx, nfy, nfz = -nfx, -nfy, -nfz
                nn = math.sqrt(nfx * nfx + nfy * nfy + nfz * nfz)
                if nn == 0.0:
                    continue
                nfx /= nn
                nfy /= nn
                nfz /= nn
                ids = (e + 3, e1 + 3, e1, e)
            nf = (nfx, nfy, nfz)
            na = nf[a]
            if abs(na) < 1e-12:
                continue
            for k in range(nv):
                fx[k] = corner[ids[k], ra]
                fy[k] = corner[ids[k], ua]
                fz[k] = corner[ids[k], a] - z0
            # projected polygon counter-clockwise in (x = ra, y = ua)
            ar = 0.0
            for k in range(nv):
                k1 = k + 1 if k + 1 < nv else 0
                ar += fx[k] * fy[k1] - fx[k1] * fy[k]
            if ar == 0.0:
                continue
            if ar < 0.0:
                for k in range(nv // 2):
                    kk = nv - 1 - k
                    fx[k], fx[kk] = fx[kk], fx[k]
                    fy[k], fy[kk] = fy[kk], fy[k]
                    fz[k], fz[kk] = fz[kk], fz[k]
            # height over the face's plane: z = h0 + gx x + gy y (relative to z0)
            gx = -nf[ra] / na
            gy = -nf[ua] / na
            h0 = fz[0] - gx * fx[0] - gy * fy[0]
            sgn = inv if na > 0.0 else -inv
            xmin = min(fx[0], fx[1], fx[2], fx[nv - 1])
            xmax = max(fx[0], fx[1], fx[2], fx[nv - 1])
            ymin = min(fy[0], fy[1], fy[2], fy[nv - 1])
            ymax = max(fy[0], fy[1], fy[2], fy[nv - 1])
            zmn = min(fz[0], fz[1], fz[2], fz[nv - 1])
            zmx = max(fz[0], fz[1], fz[2], fz[nv - 1])
            c0 = max(int(math.floor((xmin - left) / px)), 0)
            c1 = min(int(math.floor((xmax - left) / px)), nc - 1)
            r0 = max(int(math.floor((top - ymax) / px)), 0)
            r1 = min(int(math.floor((top - ymin) / px)), nr - 1)
            if c0 > c1 or r0 > r1:
                continue
            if (c0 == c1 and r0 == r1 and xmin >= left + c0 * px and xmax <= left + (c0 + 1) * px
                    and ymax <= top - r0 * px and ymin >= top - (r0 + 1) * px):
                # the whole face projects into one pixel
                line = r0 * nc + c0
                lo = tlo[line]
                hi = thi[line]
                if lo < hi:
                    if lo <= zmn and zmx <= hi:
                        out[line] += sgn * _poly_linear_integral(fx, fy, nv, h0, gx, gy)
                    else:
                        out[line] += sgn * _clamped_integral(fx, fy, nv, h0, gx, gy, lo, hi,
                                                             s2x, s2y, p1x, p1y)
                continue
            for r in range(r0, r1 + 1):
                y1 = top - r * px
                y0 = y1 - px
                # clip to the row's band once
                m1 = _clip_poly(fx, fy, nv, 0.0, 1.0, y1, p1x, p1y)
                m1 = _clip_poly(p1x, p1y, m1, 0.0, -1.0, -y0, p2x, p2y)
                if xmin < left + c0 * px:  # the face reaches past the picture's left edge
                    m1 = _clip_poly(p2x, p2y, m1, -1.0, 0.0, -(left + c0 * px), p1x, p1y)
                    for k in range(m1):
                        p2x[k] = p1x[k]
                        p2y[k] = p1y[k]
                if m1 < 3:
                    continue
                for c in range(c0, c1 + 1):
                    line = r * nc + c
                    x1 = left + (c + 1) * px
                    # split the rest of the band at the pixel's right edge
                    m = _clip_poly(p2x, p2y, m1, 1.0, 0.0, x1, s1x, s1y)
                    if c < c1:
                        m1 = _clip_poly(p2x, p2y, m1, -1.0, 0.0, -x1, p1x, p1y)
                        for k in range(m1):
                            p2x[k] = p1x[k]
                            p2y[k] = p1y[k]
                    lo = tlo[line]
                    hi = thi[line]
                    if m >= 3 and lo < hi:
                        if lo <= zmn and zmx <= hi:
                            out[line] += sgn * _poly_linear_integral(s1x, s1y, m, h0, gx, gy)
                        else:
                            out[line] += sgn * _clamped_integral(s1x, s1y, m, h0, gx, gy, lo,
                                                                 hi, s2x, s2y, p1x, p1y)
                    if m1 < 3:
                        break
@numba.njit(cache=True)
def _footprint_intervals(planes, c0, c1, r0, r1, a, ra, ua, left, top, px, nc, z0, tlo, thi):
    """(pixel, t_in, t_out) of every path through every prism over the pixels of its
    footprint box; paths run along axis ``a`` from ``z0``, clipped to [tlo, thi]. A path
    lying in a face plane parallel to it counts as outside (for the overlap count)."""
    out_l = np.empty(1024, np.int64)
    out_s = np.empty(1024)
    out_e = np.empty(1024)
    no = np.int64(0)  # not a literal 0: one specialisation of push
    for p in range(planes.shape[0]):
        for r in range(r0[p], r1[p] + 1):
            y = top - (r + 0.5) * px
            for c in range(c0[p], c1[p] + 1):
                line = r * nc + c
                t0 = tlo[line]
                t1 = thi[line]
                if not t0 < t1:
                    continue
                x = left + (c + 0.5) * px
                ok = True
                for f in range(5):
                    den = planes[p, f, a]
                    num = planes[p, f, 3] - (planes[p, f, ra] * x + planes[p, f, ua] * y
                                             + planes[p, f, a] * z0)
                    if den == 0.0:
                        # a path in a face plane (shared by neighbouring prisms) belongs
                        # to neither: only overlaps of positive length matter here
                        if num <= 1e-9 * (1.0 + abs(planes[p, f, 3])):
                            ok = False
                            break
                    else:
                        tt = num / den
                        if den > 0.0:
                            if tt < t1:
                                t1 = tt
                        elif tt > t0:
                            t0 = tt
                        if t0 >= t1:
                            ok = False
                            break
                if ok:
                    out_l, out_s, out_e, no = push(out_l, out_s, out_e, no, line, t0, t1)
    return out_l[:no], out_s[:no], out_e[:no]


@numba.njit(cache=True)
def _merge_lengths(il, is_, ie, total, eps):
    """Add to ``total[path]`` the length counted more than once by the intervals of each
    path: the sum of their lengths minus the length of their union (intervals grouped by
    path with a counting sort, then each run sorted by start)."""
    n = il.shape[0]
    if n == 0:
        return
    ol, os_, oe = regroup(il, is_, ie, total.shape[0])
    k = 0
    while k < n:
        line = ol[k]
        j = k + 1
        while j < n and ol[j] == line:
            j += 1
        if j - k == 1:
            k = j
            continue
        o2 = np.argsort(os_[k:j]) + k
        cs = os_[o2[0]]
        ce = oe[o2[0]]
        acc = 0.0
        tot = 0.0
        for q in range(j - k):
            tot += oe[o2[q]] - os_[o2[q]]
        for q in range(1, j - k):
            m = o2[q]
            if os_[m] <= ce + eps:
                if oe[m] > ce:
                    ce = oe[m]
            else:
                acc += ce - cs
                cs = os_[m]
                ce = oe[m]
        total[line] += tot - (acc + (ce - cs))
        k = j


def _overlap_weights(n_pix, pix, lo, n_vox, vox):
    """(n_pix, n_vox) lengths of overlap of pixel intervals ``lo + [i, i+1) pix`` with voxel
    intervals ``lo + [j, j+1) vox``, divided by the pixel edge."""
    pe = lo + np.arange(n_pix + 1) * pix
    ve = lo + np.arange(n_vox + 1) * vox
    w = (np.minimum(pe[1:, None], ve[None, 1:]) - np.maximum(pe[:-1, None], ve[None, :-1]))
    return np.clip(w, 0.0, None) / pix


def _project_grid(g: PhaseGrid, a, z0, z1, pixel=None):
    """Solid thickness along axis ``a`` between ``z0`` and ``z1`` of the voxel model (each
    solid voxel counts with the length of its overlap with the slab), as a picture
    [row = -up, col = right] at ``pixel`` (default the finer in-plane voxel edge). Each
    pixel is the area-weighted mean of the voxel columns it overlaps (overlap area over the
    pixel area), so the picture's integral is the voxel model's solid volume in the slab.
    ``valid``: the voxel column at the pixel's centre holds a voxel inside the domain.
    Returns (thickness, valid, pixel)."""
    sp = np.asarray(g.spacing, float)
    org = np.asarray(g.origin, float)
    lo_a = org[a] + np.arange(g.shape[a]) * sp[a]
    wa = np.clip(np.minimum(lo_a + sp[a], z1) - np.maximum(lo_a, z0), 0.0, None)
    ks = np.flatnonzero(wa > 0)
    sub = np.take(g.labels, ks, axis=a)
    shp = [1, 1, 1]
    shp[a] = len(ks)
    solid = ((sub == SOLID) * wa[ks].reshape(shp)).sum(axis=a)
    c = org[a] + (np.arange(g.shape[a]) + 0.5) * sp[a]
    kc = np.flatnonzero((c >= z0) & (c < z1))
    inside = (np.take(g.labels, kc if len(kc) else ks, axis=a) != OUTSIDE).any(axis=a)
    ra, ua = _picture_axes(a)
    rem = [i for i in range(3) if i != a]
    if rem.index(ra) == 0:
        solid, inside = solid.T, inside.T  # [ua, ra]
    px = float(min(sp[ra], sp[ua])) if pixel is None else float(pixel)
    nc = max(1, int(math.ceil(g.shape[ra] * sp[ra] / px - 1e-9)))
    nr = max(1, int(math.ceil(g.shape[ua] * sp[ua] / px - 1e-9)))
    _check_side(nr, nc, px)
    same = (abs(px - sp[ra]) <= 1e-12 * px and abs(px - sp[ua]) <= 1e-12 * px)
    if same:
        t = solid
    else:
        wr = _overlap_weights(nc, px, 0.0, g.shape[ra], sp[ra])   # (nc, n_ra)
        wu = _overlap_weights(nr, px, 0.0, g.shape[ua], sp[ua])   # (nr, n_ua)
        t = wu @ solid @ wr.T
    ic = np.minimum(((np.arange(nc) + 0.5) * px / sp[ra]).astype(np.int64), g.shape[ra] - 1)
    iu = np.minimum(((np.arange(nr) + 0.5) * px / sp[ua]).astype(np.int64), g.shape[ua] - 1)
    valid = inside[np.ix_(iu, ic)]
    t = t[::-1]
    valid = valid[::-1]
    return np.ascontiguousarray(t).astype(float), np.ascontiguousarray(valid), px


# ====================================================================== pictures
def segment_projection(p: ProjectionImage, threshold=None) -> tuple[np.ndarray, float]:
    """Binary solid mask of a projection: intensity below ``threshold`` (default Otsu's
    threshold over the valid pixels, Otsu 1979, via scikit-image) is solid."""
    from skimage.filters import threshold_otsu
    vals = p.intensity[p.valid]
    if threshold is None:
        if vals.size == 0 or float(vals.max() - vals.min()) <= 0:
            raise OptionError("the projection has no contrast to threshold (no solid in the slab?)")
        thr = float(threshold_otsu(vals))
    else:
        thr = float(threshold)
    return (p.intensity < thr) & p.valid, thr
