"""Virtual micrographs: phase sections of any plane and transmission-like projections.

*Section*: the phase map (solid, interlayer, gel pore, outside) on the plane through
``centre + offset * n`` with unit normal ``n``, sampled from the phase grid by nearest
voxel (:func:`sheetview.view.sample_section`); ``centre`` is the domain's centre.

*Projection*: the solid thickness ``t(x, y)`` crossed by a straight path along an axis
through a slab of the structure, and the transmitted fraction ``exp(-t / lambda)`` (the
Beer-Lambert form used for mass-thickness contrast in transmission electron microscopy,
e.g. Williams & Carter, *Transmission Electron Microscopy*, 2nd ed., 2009, ch. 22: common
practice), optionally blurred by a Gaussian whose full width at half maximum is the
instrument resolution. For prisms the thickness is exact: each pixel's path is clipped
against the prisms' face planes (the exact-chord kernels of
:mod:`sheetview.measures.chords`), overlapping prisms counted once; for a phase grid it
is the number of solid voxels along the path times the voxel edge.

What these images are not: a simulation of electron optics (no phase contrast, defocus,
noise, damage or sample preparation). They show the geometry that a micrograph of this
structure could at best resolve; hold them against real micrographs with that in mind.

Images are arrays indexed ``[row, col]`` with ``row`` running down the picture: for an
axis-aligned normal the picture's right-hand axis and up axis follow
:func:`sheetview.view.plane_basis` (``z``: right = x, up = y; ``x``: right = y, up = z;
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
from ..structure import Structure, SurfaceBody
from .chords import _push, _regroup

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
    from ..view import _vec3, plane_basis
    if axis is not None and normal is not None:
        raise OptionError("give the plane by --axis or by --normal, not both", field="normal")
    if normal is not None:
        return plane_basis(_vec3(normal, "--normal"))[0]
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


def phase_grid_of(obj, settings: dict | None = None) -> PhaseGrid:
    """The classified phase grid of ``obj`` with the measure settings (``voxel``,
    ``max_memory``, stacking tolerances): the same grid ``sheetview measure`` uses."""
    if isinstance(obj, PhaseGrid):
        return obj
    from ..app.run import phase_grid
    from ..app.settings import Settings
    return phase_grid(obj, Settings.of(settings))


def section(obj, normal=(0.0, 0.0, 1.0), offset: float = 0.0, *, pixel: float | None = None,
            settings: dict | None = None, grid: PhaseGrid | None = None) -> SectionImage:
    """The phase section of ``obj`` (Structure, SurfaceBody or PhaseGrid) on the plane
    with ``normal`` at signed distance ``offset`` (nm) from the domain's centre.

    ``pixel`` defaults to the grid's voxel edge. The picture covers the projection of the
    grid's box onto the plane; pixels off the grid are 255.
    """
    from ..view import plane_basis, sample_section
    pixel = _check_pixel(pixel)
    off = float(offset)
    if not math.isfinite(off):
        raise OptionError(f"--offset must be a finite length in nm, got {offset!r}", field="offset")
    g = grid if grid is not None else phase_grid_of(obj, settings)
    n, u, v = plane_basis(normal)
    centre, span = centre_and_span(obj, g)
    half = 0.5 * float(np.abs(span) @ np.abs(n))
    notes = []
    if abs(off) > half:
        raise OptionError(f"--offset {off:g} nm puts the plane outside the sample (it spans "
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
                          f"(pixel {px:g} nm): move it inward (--offset) or use a smaller --pixel",
                          field="offset")
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
               settings: dict | None = None) -> ProjectionImage:
    """Project ``obj`` along ``axis`` through a slab of thickness ``slab`` (nm; default the
    whole domain) centred ``offset`` nm from the domain's centre.

    Prisms: exact path lengths through the prisms (clipped to the domain and the slab).
    Closed bodies and phase grids: solid voxels counted along the path (a grid is built
    for a body with the measure settings).
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
        raise OptionError(f"--offset must be a finite length in nm, got {offset!r}", field="offset")
    if slab is None and off != 0:
        raise OptionError("--offset places a slab: give its thickness with --slab (without it "
                          "the whole sample is projected)", field="offset")
    if isinstance(obj, Structure):
        g = None
        centre, span = centre_and_span(obj)
    elif isinstance(obj, (PhaseGrid, SurfaceBody)):
        g = phase_grid_of(obj, settings)
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
        method = "exact paths through prisms"
    else:
        t, valid, px = _project_grid(g, a, z0, z1)
        nr, nc = t.shape
        method = "solid voxels along the path"
        if pixel is not None and abs(px - pixel) > 1e-9 * pixel:
            notes.append(f"a phase grid projects at its voxel edge ({px:g} nm), not at --pixel")
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
    """Exact solid path length per pixel: each prism is scan-converted over the pixels of
    its footprint; each pixel's path is clipped against the prism's 5 face planes
    (Cyrus-Beck), then the intervals of one path are merged (overlaps counted once)."""
    from .chords import _domain_interval, _periodic_images, prism_planes
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
        v, nrm, th = _periodic_images(s, dom)
    else:
        tlo, thi = _domain_interval(dom, o, u, np.full(len(o), length))
        v, nrm, th = s.vertices, s.normals, s.thickness
    valid = thi > tlo
    del o, u, rows, cols
    t = np.zeros(nr * nc)
    if len(v):
        planes = prism_planes(v, nrm, th)
        off = np.abs(nrm) * (0.5 * np.asarray(th))[:, None]
        blo = np.asarray(v).min(axis=1) - off
        bhi = np.asarray(v).max(axis=1) + off
        c0 = np.maximum(np.ceil((blo[:, ra] - left) / px - 0.5), 0).astype(np.int64)
        c1 = np.minimum(np.floor((bhi[:, ra] - left) / px - 0.5), nc - 1).astype(np.int64)
        r0 = np.maximum(np.ceil((top - bhi[:, ua]) / px - 0.5), 0).astype(np.int64)
        r1 = np.minimum(np.floor((top - blo[:, ua]) / px - 0.5), nr - 1).astype(np.int64)
        keep = (c1 >= c0) & (r1 >= r0) & (bhi[:, a] > z0) & (blo[:, a] < z1)
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
        for b0, b1 in zip(edges[:-1], edges[1:]):
            sel = np.flatnonzero((r1 >= b0) & (r0 < b1))
            if len(sel) == 0:
                continue
            il, is_, ie = _footprint_intervals(
                np.ascontiguousarray(planes[sel]), c0[sel], c1[sel], np.maximum(r0[sel], b0),
                np.minimum(r1[sel], b1 - 1), a, ra, ua, left, top, px, nc, z0, tlo, thi)
            _merge_lengths(il, is_, ie, t, 1e-9)
    return t.reshape(nr, nc), valid.reshape(nr, nc)


@numba.njit(cache=True)
def _footprint_intervals(planes, c0, c1, r0, r1, a, ra, ua, left, top, px, nc, z0, tlo, thi):
    """(pixel, t_in, t_out) of every path through every prism over the pixels of its
    footprint box; paths run along axis ``a`` from ``z0``, clipped to [tlo, thi]."""
    out_l = np.empty(1024, np.int64)
    out_s = np.empty(1024)
    out_e = np.empty(1024)
    no = 0
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
                        if num < 0.0:
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
                    out_l, out_s, out_e, no = _push(out_l, out_s, out_e, no, line, t0, t1)
    return out_l[:no], out_s[:no], out_e[:no]


@numba.njit(cache=True)
def _merge_lengths(il, is_, ie, total, eps):
    """Add the length of the union of each path's intervals to ``total[path]``
    (intervals grouped by path with a counting sort, then each run sorted by start)."""
    n = il.shape[0]
    if n == 0:
        return
    ol, os_, oe = _regroup(il, is_, ie, total.shape[0])
    k = 0
    while k < n:
        line = ol[k]
        j = k + 1
        while j < n and ol[j] == line:
            j += 1
        if j - k == 1:
            total[line] += oe[k] - os_[k]
            k = j
            continue
        o2 = np.argsort(os_[k:j]) + k
        cs = os_[o2[0]]
        ce = oe[o2[0]]
        acc = 0.0
        for q in range(1, j - k):
            m = o2[q]
            if os_[m] <= ce + eps:
                if oe[m] > ce:
                    ce = oe[m]
            else:
                acc += ce - cs
                cs = os_[m]
                ce = oe[m]
        total[line] += acc + (ce - cs)
        k = j


def _project_grid(g: PhaseGrid, a, z0, z1):
    """Solid voxels along axis ``a`` between ``z0`` and ``z1`` times the voxel edge, as a
    picture [row = -up, col = right] at the finer in-plane voxel edge (nearest voxel where
    the in-plane edges differ). Returns (thickness, valid, pixel)."""
    sp = np.asarray(g.spacing, float)
    org = np.asarray(g.origin, float)
    c = org[a] + (np.arange(g.shape[a]) + 0.5) * sp[a]
    ks = np.flatnonzero((c >= z0) & (c < z1))
    sub = np.take(g.labels, ks, axis=a)
    solid = (sub == SOLID).sum(axis=a) * sp[a]
    inside = (sub != OUTSIDE).any(axis=a)
    ra, ua = _picture_axes(a)
    rem = [i for i in range(3) if i != a]
    if rem.index(ra) == 0:
        solid, inside = solid.T, inside.T  # [ua, ra]
    px = float(min(sp[ra], sp[ua]))
    nc = max(1, int(round(g.shape[ra] * sp[ra] / px)))
    nr = max(1, int(round(g.shape[ua] * sp[ua] / px)))
    ic = np.minimum(((np.arange(nc) + 0.5) * px / sp[ra]).astype(np.int64), g.shape[ra] - 1)
    iu = np.minimum(((np.arange(nr) + 0.5) * px / sp[ua]).astype(np.int64), g.shape[ua] - 1)
    t = solid[np.ix_(iu, ic)][::-1]
    valid = inside[np.ix_(iu, ic)][::-1]
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
