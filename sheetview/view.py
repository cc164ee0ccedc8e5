"""The viewer: a PyVista window, off-screen pictures, contact sheets of sections, and
export of prisms with computed arrays for general-purpose viewers.

Everything that is drawn is built here from plain numpy arrays:

* :func:`prism_mesh` -- all prisms as one PolyData (2 triangles + 3 quads per prism, built
  without a Python loop over prisms), with one value per prism repeated over its 5 cells;
* :func:`scalars_for` -- the per-prism values of a colouring (stack, stacking number,
  local order, angle to the director, angle to the wall, birth time, tag), computed
  lazily by the measures;
* :func:`sample_section` -- the phase labels of a :class:`~sheetview.grid.PhaseGrid` on
  any plane, by nearest-voxel lookup;
* :class:`Scene` -- the state of a window (colouring, section plane, visible phases,
  picked prism). Its callbacks are plain methods, so they work (and are tested) without
  a window; :meth:`Scene.attach` draws the scene into a ``pyvista.Plotter``.

:func:`render` draws a scene off-screen to a PNG; :func:`contact_sheet` draws a grid of
axis-aligned sections with matplotlib (Agg); :func:`export` writes the prisms with their
computed arrays (``.vtp``) and the phase grid (``.vti``).
"""
from __future__ import annotations

import math
import os
import sys
from dataclasses import dataclass
from pathlib import Path
from typing import NamedTuple

import numpy as np

from .app.run import phase_grid as build_phase_grid
from .app.settings import Settings
from .errors import InputError, OptionError, SheetviewError
from .grid import GEL, INTERLAYER, OUTSIDE, SOLID
from .measures.sections import Section, grid_bounds, parse_vector, plane_basis, sample_section
from .style import (BACKGROUND, GROUP_PALETTE, NAN_COLOUR, OUTLINE_COLOUR, PHASE_COLOURS,
                    PHASE_LABELS, PHASE_OPACITY, PHASE_ORDER, TEXT_COLOUR, section_rgb)
from .style import rgb as colour_rgb
from .grid import default_voxel_size
from .io import write
from .io.output import atomic_path, check_writable
from .measures.orientation import DEFAULTS, local_order, q_summary, q_tensor
from .measures.stacking import stacking
from .structure import Structure

class ColouringInfo(NamedTuple):
    label: str
    unit: str
    kind: str          # "integer", "continuous" or "group"
    cmap: str | None   # matplotlib colormap for integer / continuous kinds


#: The colourings, in the order the "next colouring" key steps through them.
COLOURINGS = {
    "stacking": ColouringInfo("stacking number", "layers", "integer", "viridis"),
    "stack": ColouringInfo("stack", "", "group", None),
    "order": ColouringInfo("local order", "", "continuous", "cividis"),
    "director": ColouringInfo("angle to the director", "deg", "continuous", "cividis"),
    "wall": ColouringInfo("angle to the wall", "deg", "continuous", "cividis"),
    "born": ColouringInfo("birth time", "", "continuous", "viridis"),
    "tag": ColouringInfo("tag", "", "group", None),
}

#: Fixed colour ranges where the quantity has natural bounds.
FIXED_RANGES = {"order": (0.0, 1.0), "director": (0.0, 90.0), "wall": (0.0, 90.0)}

#: Cells per prism in :func:`prism_mesh`: bottom and top triangles, three side quads.
CELLS_PER_PRISM = 5
_TRIS = np.array([[0, 2, 1], [3, 4, 5]], dtype=np.int64)            # outward wound
_QUADS = np.array([[0, 1, 4, 3], [1, 2, 5, 4], [2, 0, 3, 5]], dtype=np.int64)


def _square_actor(x, y, w, h, rgb):
    """A filled rectangle in normalised window coordinates (a legend swatch)."""
    import vtk

    pts = vtk.vtkPoints()
    for px, py in ((x, y), (x + w, y), (x + w, y + h), (x, y + h)):
        pts.InsertNextPoint(px, py, 0.0)
    cells = vtk.vtkCellArray()
    cells.InsertNextCell(4, [0, 1, 2, 3])
    poly = vtk.vtkPolyData()
    poly.SetPoints(pts)
    poly.SetPolys(cells)
    coord = vtk.vtkCoordinate()
    coord.SetCoordinateSystemToNormalizedViewport()
    mapper = vtk.vtkPolyDataMapper2D()
    mapper.SetInputData(poly)
    mapper.SetTransformCoordinate(coord)
    actor = vtk.vtkActor2D()
    actor.SetMapper(mapper)
    actor.GetProperty().SetColor(*[float(c) for c in rgb])
    return actor


# ========================================================================= colourings
class Colouring(NamedTuple):
    """Per-prism values of a colouring, with their wording (unpacks as a 4-tuple)."""

    values: np.ndarray
    label: str
    unit: str
    kind: str


def _unit_label(label, unit):
    return f"{label} ({unit})" if unit else label


def available_colourings(structure) -> list[str]:
    """The colourings that apply to ``structure``, in the order of :data:`COLOURINGS`.

    ``born`` and ``tag`` need those columns; ``wall`` needs a domain with walls (not a
    periodic box); ``order`` needs :mod:`sheetview.measures.orientation`.
    """
    out = []
    for key in COLOURINGS:
        if key in ("born", "tag") and key not in structure.columns:
            continue
        if key == "wall" and getattr(structure.domain, "periodic", False):
            continue
        if key == "order" and not _has_module("sheetview.measures.orientation"):
            continue
        out.append(key)
    return out


def _has_module(name):
    import importlib.util
    try:
        return importlib.util.find_spec(name) is not None
    except ModuleNotFoundError:
        return False


def stacking_result(structure, cache: dict | None = None):
    """The :func:`sheetview.measures.stacking.stacking` result, cached in ``cache``."""
    cache = {} if cache is None else cache
    if "stacking" not in cache:
        cache["stacking"] = stacking(structure)
    return cache["stacking"]


def director_of(structure, cache: dict | None = None) -> np.ndarray:
    """The director: principal axis of the volume-weighted Q tensor of the normals."""
    cache = {} if cache is None else cache
    if "director" not in cache:
        _, d, _, _ = q_summary(q_tensor(structure.normals, structure.volumes))
        cache["director"] = np.array([0.0, 0.0, 1.0]) if d is None else np.asarray(d, float)
    return cache["director"]


def scalars_for(structure, colour_by: str, cache: dict | None = None) -> Colouring:
    """Per-prism values of the colouring ``colour_by`` (a key of :data:`COLOURINGS`).

    Returns
    -------
    Colouring
        ``(values, label, unit, kind)``; ``values`` has one entry per prism.

    Notes
    -----
    * ``stacking``, ``stack``: :func:`sheetview.measures.stacking.stacking` (stacking
      number, stack id);
    * ``order``: :func:`sheetview.measures.orientation.local_order` (largest eigenvalue of
      the volume-weighted Q tensor within the default radius);
    * ``director``: ``acos(|n . d|)`` in degrees, ``d`` the director (0 = aligned);
    * ``wall``: ``acos(|n . w|)`` in degrees, ``w`` the inward wall normal at the
      centroid (0 = lying flat against the wall, 90 = standing on edge);
    * ``born``, ``tag``: the structure's columns.

    The measures are imported here, not at module import, and their results are kept in
    ``cache`` (a dict) so that switching colourings does not recompute them.
    """
    if colour_by not in COLOURINGS:
        raise OptionError(f"unknown colouring {colour_by!r}; choose one of "
                          f"{', '.join(COLOURINGS)}", param="colour_by")
    cache = {} if cache is None else cache
    info = COLOURINGS[colour_by]
    n = len(structure)
    if colour_by == "stacking":
        vals = stacking_result(structure, cache).stacking_number
    elif colour_by == "stack":
        vals = stacking_result(structure, cache).stack
    elif colour_by == "order":
        if "order" not in cache:
            cache["order"] = local_order(structure.centroids, structure.normals,
                                         structure.volumes, DEFAULTS["local_radius"],
                                         structure.domain)
        vals = cache["order"]
    elif colour_by == "director":
        d = director_of(structure, cache)
        c = np.abs(structure.normals @ d)
        vals = np.degrees(np.arccos(np.clip(c, 0.0, 1.0)))
    elif colour_by == "wall":
        dom = structure.domain
        if getattr(dom, "periodic", False):
            raise OptionError("a periodic box has no walls: the angle to the wall is undefined",
                              param="colour_by", path=structure.source)
        w = np.asarray(dom.inward_normal(structure.centroids), dtype=float).reshape(n, 3)
        with np.errstate(invalid="ignore"):
            c = np.abs(np.einsum("ij,ij->i", structure.normals, w))
            vals = np.degrees(np.arccos(np.clip(c, 0.0, 1.0)))
    else:
        if colour_by not in structure.columns:
            have = ", ".join(sorted(structure.columns)) or "none"
            raise OptionError(f"colouring by {colour_by!r} needs a '{colour_by}' column in "
                              f"the prisms (columns present: {have})", param="colour_by",
                              path=structure.source)
        vals = structure.columns[colour_by]
    unit = info.unit
    if colour_by == "born":
        unit = str(structure.metadata.get("time_unit", structure.metadata.get("born_unit", "")))
    return Colouring(np.asarray(vals), info.label, unit, info.kind)


@dataclass
class Display:
    """How a colouring is drawn: per-prism scalars for a lookup table.

    ``colours`` is the table (K, 3) of RGB floats, ``clim`` the scalar range it spans
    (value ``clim[0]`` is the first colour, ``clim[1]`` the last), ``title`` the scalar
    bar title (None: no bar) and ``legend`` the (label, colour) entries of group
    colourings.
    """

    scalars: np.ndarray
    colours: np.ndarray
    clim: tuple
    title: str | None
    legend: list
    n_labels: int = 5
    fmt: str = "%.3g"
    note: str = ""


def display_of(colouring: Colouring, key: str | None = None) -> Display:
    """Scalars and lookup table of a colouring.

    * integer (stacking number): one flat colour per whole number from 1 to the largest
      value ``m``; value ``k`` gets ``cmap((k - 1) / (m - 1))`` (``m = 2`` at least);
    * continuous: 256 colours of the colormap over the fixed range of the quantity
      (order 0..1, angles 0..90 deg) or the data range;
    * group (stack, tag): the qualitative palette; up to 7 distinct groups each get their
      own colour (listed in the legend), more groups cycle through the palette by id.
    """
    import matplotlib

    vals = np.asarray(colouring.values)
    title = _unit_label(colouring.label, colouring.unit)
    if colouring.kind == "integer":
        v = vals[np.isfinite(vals)] if vals.dtype.kind == "f" else vals
        lo = 1
        hi = int(max(2, v.max() if v.size else 2))
        cmap = matplotlib.colormaps[COLOURINGS[key].cmap if key else "viridis"]
        colours = cmap(np.linspace(0.0, 1.0, hi - lo + 1))[:, :3]
        n_labels = hi - lo + 1 if hi - lo + 1 <= 11 else 6
        return Display(vals.astype(np.float32), colours, (lo - 0.5, hi + 0.5), title, [],
                       n_labels, "%.0f")
    if colouring.kind == "continuous":
        cmap = matplotlib.colormaps[COLOURINGS[key].cmap if key else "cividis"]
        if key in FIXED_RANGES:
            clim = FIXED_RANGES[key]
        else:
            fin = vals[np.isfinite(vals)]
            clim = (float(fin.min()), float(fin.max())) if fin.size else (0.0, 1.0)
            if clim[1] <= clim[0]:
                clim = (clim[0] - 0.5, clim[0] + 0.5)
        colours = cmap(np.linspace(0.0, 1.0, 256))[:, :3]
        return Display(vals.astype(np.float32), colours, clim, title, [], 5, "%.3g")
    # groups
    pal = np.array([colour_rgb(c) for c in GROUP_PALETTE])
    uniq, inv = np.unique(vals, return_inverse=True)
    inv = inv.reshape(-1)
    k = len(pal)
    if len(uniq) <= k:
        idx = inv
        legend = [(f"{colouring.label} {u}", pal[i]) for i, u in enumerate(uniq)]
        note = ""
    else:
        idx = inv % k
        legend = []
        note = f"{len(uniq)} {colouring.label}s, {k} colours repeated"
    return Display(idx.astype(np.float32), pal, (-0.5, k - 0.5), None, legend, 5, "%.0f", note)


# ============================================================================= meshes
def prism_faces(n: int) -> np.ndarray:
    """The VTK face array of ``n`` prisms of 6 points each: 2 triangles + 3 quads per
    prism (23 integers per prism), outward wound, without a Python loop over prisms."""
    base = (6 * np.arange(n, dtype=np.int64))[:, None, None]
    tris = np.concatenate([np.full((n, 2, 1), 3, np.int64), base + _TRIS[None]], axis=2)
    quads = np.concatenate([np.full((n, 3, 1), 4, np.int64), base + _QUADS[None]], axis=2)
    return np.concatenate([tris.reshape(n, 8), quads.reshape(n, 15)], axis=1).ravel()


def prism_mesh(structure, values=None, name: str = "value"):
    """All prisms of ``structure`` as one ``pyvista.PolyData``.

    Points are the six prism corners (:meth:`Structure.prism_corners`, float32), cells the
    bottom and top triangles and three side quads of each prism (cells ``5 i .. 5 i + 4``
    belong to prism ``i``). ``values`` (one per prism), if given, become the cell array
    ``name``, each value repeated over its prism's 5 cells.
    """
    import pyvista as pv

    n = len(structure)
    if n == 0:
        return pv.PolyData()
    pts = structure.prism_corners().reshape(-1, 3).astype(np.float32)
    mesh = pv.PolyData(pts, faces=prism_faces(n))
    if values is not None:
        set_prism_values(mesh, values, name)
    return mesh


def set_prism_values(mesh, values, name: str = "value"):
    """Set the cell array ``name`` of a :func:`prism_mesh` from one value per prism."""
    v = np.asarray(values)
    mesh.cell_data[name] = np.repeat(v, CELLS_PER_PRISM)
    mesh.cell_data.active_scalars_name = name
    return mesh


def outline_mesh(domain):
    """Lines tracing the domain: the 12 edges of a box, or three great circles of a sphere."""
    import pyvista as pv

    if getattr(domain, "shape", None) == "sphere":
        c = np.asarray(domain.center)
        r = domain.radius
        t = np.linspace(0.0, 2.0 * math.pi, 129)[:-1]
        cs, sn = np.cos(t), np.sin(t)
        rings = [np.stack([cs, sn, 0 * t], 1), np.stack([cs, 0 * t, sn], 1),
                 np.stack([0 * t, cs, sn], 1)]
        pts = np.concatenate(rings) * r + c
        m = len(t)
        lines = []
        for k in range(3):
            ids = k * m + np.arange(m + 1) % m
            lines.append(np.concatenate([[m + 1], ids]))
        return pv.PolyData(pts, lines=np.concatenate(lines))
    lo, hi = (np.asarray(b, float) for b in domain.bounds)
    return pv.Box(bounds=(lo[0], hi[0], lo[1], hi[1], lo[2], hi[2])).extract_all_edges()


# ============================================================================ sections
def section_mesh(section: Section, visible=PHASE_ORDER, lift: float = 0.0, opacity=None):
    """The visible pixels of a section as quads (one per pixel) with RGB cell colours
    (RGBA with ``opacity``, a dict phase code -> 0..1), lifted by ``lift`` nm along the
    plane normal."""
    import pyvista as pv

    lab = section.labels
    keep = np.isin(lab, np.asarray(list(visible), dtype=np.uint8))
    ia, ib = np.nonzero(keep)
    m = len(ia)
    if m == 0:
        return pv.PolyData()
    da = np.array([0, 1, 1, 0], float)
    db = np.array([0, 0, 1, 1], float)
    s = section.u0 + (ia[:, None] + da) * section.pixel
    t = section.v0 + (ib[:, None] + db) * section.pixel
    o = section.origin + lift * section.normal
    pts = o + s[..., None] * section.u + t[..., None] * section.v
    faces = np.concatenate([np.full((m, 1), 4, np.int64),
                            np.arange(4 * m, dtype=np.int64).reshape(m, 4)], axis=1).ravel()
    mesh = pv.PolyData(pts.reshape(-1, 3).astype(np.float32), faces=faces)
    rgb = section_rgb(lab[ia, ib])
    if opacity is None:
        mesh.cell_data["phase_colour"] = rgb
    else:
        alpha = np.full(256, 255, np.uint8)
        for code, a in opacity.items():
            alpha[code] = int(round(255 * a))
        mesh.cell_data["phase_colour"] = np.concatenate([rgb, alpha[lab[ia, ib]][:, None]], axis=1)
    return mesh


# ============================================================================ the grid
#: Largest number of voxels of the grid the viewer rasterizes when no voxel size is given.
VIEW_MAX_VOXELS = 40_000_000


def view_voxel_size(structure) -> float:
    """Default voxel edge (nm) of the viewer's grid: the rasterizer's default
    (:func:`sheetview.grid.default_voxel_size`), coarsened if needed so that the domain's
    bounding box holds at most :data:`VIEW_MAX_VOXELS` voxels (rounded up to 3 digits)."""

    v = default_voxel_size(structure)
    lo, hi = (np.asarray(b, float) for b in structure.domain.bounds)
    floor = float(np.prod(hi - lo) / VIEW_MAX_VOXELS) ** (1.0 / 3.0)
    if floor > v:
        e = math.floor(math.log10(floor)) - 2
        v = math.ceil(floor / 10 ** e) * 10 ** e
    return float(v)


def phase_grid(structure, voxel_size=None, cache: dict | None = None):
    """The phase map shown on cuts: the phase grid of ``measure``
    (:func:`sheetview.app.run.phase_grid`, the stacking graph taken from ``cache`` or
    computed and kept there), at ``voxel_size`` nm (default :func:`view_voxel_size`)."""
    if voxel_size is None:
        voxel_size = view_voxel_size(structure)
    graph = stacking_result(structure, cache).graph
    return build_phase_grid(structure, Settings(voxel=voxel_size), graph=graph)


# =============================================================================== scene
#: Key bindings of the window: key symbol -> (method, argument, wording for the help line).
KEYS = {
    "period": ("step_plane", +1, ". / ,  move the cut one step forward / back"),
    "comma": ("step_plane", -1, None),
    "n": ("next_colouring", +1, "n  next colouring"),
    "1": ("toggle_phase", SOLID, "1 2 3 4  show or hide solid, interlayer, gel pore, outside"),
    "2": ("toggle_phase", INTERLAYER, None),
    "3": ("toggle_phase", GEL, None),
    "4": ("toggle_phase", OUTSIDE, None),
    "x": ("face_axis", 0, "x y z  turn the cut to face an axis"),
    "y": ("face_axis", 1, None),
    "z": ("face_axis", 2, None),
    "h": ("toggle_section", None, "h  cut on / off"),
    "o": ("toggle_outline", None, "o  domain outline on / off"),
    "i": ("save_screenshot", None, "i  save a picture"),
}
PICK_HINT = "right click on a prism: figures of its stack"


def _fmt_vec(v, digits=3):
    return "(" + ", ".join(f"{x:.{digits}g}" for x in v) + ")"


class Scene:
    """What a window shows, and the callbacks that change it.

    Parameters
    ----------
    structure : Structure
    colour_by : str
        First colouring (a key of :data:`COLOURINGS`).
    grid : PhaseGrid, optional
        Phase grid for sections; rasterized from ``structure`` when first needed.
    voxel_size : float, optional
        Voxel edge (nm) for that rasterization.
    plane : (origin, normal), optional
        Section plane; default through the domain centre, facing +z.
    step : float, optional
        Distance (nm) the plane moves per step; default the structure's repeat.
    section : bool
        Whether to cut the prisms and show the section at first.
    lighting : bool
        Shade prisms (False: flat colours, exact lookup-table colours in pictures).
    screenshot_stem : str
        Name stem of saved pictures (``STEM_view_001.png`` ...).
    decorations : bool
        Scalar bar, legend and status line.
    see_through : bool
        Draw the pore phases of the cut half transparent (:data:`PHASE_OPACITY`).

    Notes
    -----
    The plane cuts the prisms on the GPU (a mapper clipping plane): prisms, and parts of
    prisms, on the side the normal points to are not drawn, and the phase section is drawn
    on the plane. Moving the plane rebuilds only the section.
    """

    def __init__(self, structure, *, colour_by: str = "stacking", grid=None, voxel_size=None,
                 plane=None, step: float | None = None, section: bool = True,
                 lighting: bool = True, screenshot_stem: str = "sheetview",
                 decorations: bool = True, see_through: bool = True,
                 cache: dict | None = None):
        if len(structure) == 0:
            raise InputError("the structure has no prisms: nothing to show", path=structure.source)
        self.structure = structure
        self.cache = {} if cache is None else cache
        self.colour_keys = available_colourings(structure)
        if colour_by not in COLOURINGS:
            raise OptionError(f"unknown colouring {colour_by!r}; choose one of "
                              f"{', '.join(COLOURINGS)}", param="colour_by")
        self.colour_by = colour_by
        self.colouring = scalars_for(structure, colour_by, self.cache)
        self.display = display_of(self.colouring, colour_by)
        self.mesh = prism_mesh(structure, self.display.scalars)
        self._grid = grid
        self.voxel_size = voxel_size
        lo, hi = (np.asarray(b, float) for b in structure.domain.bounds)
        self.bounds = (lo, hi)
        if plane is None:
            origin, normal = 0.5 * (lo + hi), (0.0, 0.0, 1.0)
        else:
            origin, normal = plane
        self.plane_origin = np.asarray(origin, float).reshape(3)
        self.plane_normal = plane_basis(normal)[0]
        self.step = float(structure.spacing if step is None else step)
        if not (math.isfinite(self.step) and self.step > 0):
            raise OptionError(f"the plane step must be a positive number of nm, got {step!r}",
                              param="step")
        self.section_on = bool(section)
        self.visible_phases = set(PHASE_ORDER)
        self.outline_on = True
        self.lighting = bool(lighting)
        self.decorations = bool(decorations)
        self.see_through = bool(see_through)
        self.section: Section | None = None
        self.picked: int | None = None
        self.panel_text = ""
        self.status = ""
        self.screenshot_stem = screenshot_stem
        self.saved: list[Path] = []
        self.plotter = None
        self._clip = None
        self._plane_widget = None
        if self.section_on:
            self.update_section()

    # ----------------------------------------------------------------- data
    @property
    def grid(self):
        if self._grid is None:
            self._grid = phase_grid(self.structure, self.voxel_size, self.cache)
        return self._grid

    def update_section(self) -> Section:
        """Resample the section on the current plane (and redraw it if attached)."""
        self.section = sample_section(self.grid, self.plane_origin, self.plane_normal)
        self._draw_section()
        return self.section

    # ------------------------------------------------------------ callbacks
    def set_plane(self, origin=None, normal=None) -> None:
        """Put the section plane through ``origin`` with ``normal`` (either may be kept)."""
        if origin is not None:
            self.plane_origin = np.asarray(origin, float).reshape(3)
        if normal is not None:
            self.plane_normal = plane_basis(normal)[0]
        if self.section_on:
            self.update_section()
        self._sync_widget()
        self._update_status()

    def step_plane(self, direction: int = +1) -> np.ndarray:
        """Move the plane by ``direction * step`` nm along its normal; returns the new origin."""
        self.set_plane(self.plane_origin + float(direction) * self.step * self.plane_normal)
        return self.plane_origin

    def face_axis(self, axis: int) -> None:
        """Turn the plane to face axis 0, 1 or 2 (x, y, z), keeping its origin."""
        n = np.zeros(3)
        n[int(axis)] = 1.0
        self.set_plane(normal=n)

    def next_colouring(self, step: int = +1) -> str:
        """Switch to the next (or previous) applicable colouring; returns its key."""
        keys = self.colour_keys
        i = keys.index(self.colour_by) if self.colour_by in keys else -1
        key = keys[(i + step) % len(keys)]
        self.set_colouring(key)
        return key

    def set_colouring(self, key: str) -> None:
        self.colouring = scalars_for(self.structure, key, self.cache)
        self.colour_by = key
        self.display = display_of(self.colouring, key)
        set_prism_values(self.mesh, self.display.scalars)
        self._draw_prisms()
        self._update_status()

    def toggle_phase(self, code: int) -> bool:
        """Show or hide one phase in the section; returns whether it is now shown."""
        code = int(code)
        if code not in PHASE_COLOURS:
            raise OptionError(f"unknown phase code {code}", param="phase")
        if code in self.visible_phases:
            self.visible_phases.discard(code)
        else:
            self.visible_phases.add(code)
        self._draw_section()
        self._draw_legend()
        return code in self.visible_phases

    def toggle_section(self) -> bool:
        """Cut on / off; returns whether the cut is now on."""
        self.section_on = not self.section_on
        if self.section_on and self.section is None:
            self.update_section()
        self._apply_clip()
        self._draw_section()
        self._draw_legend()
        self._update_status()
        return self.section_on

    def toggle_outline(self) -> bool:
        """Domain outline on / off; returns whether it is now shown."""
        self.outline_on = not self.outline_on
        if self.plotter is not None and "outline" in self.plotter.actors:
            self.plotter.actors["outline"].SetVisibility(self.outline_on)
            self._render()
        return self.outline_on

    def stack_figures(self, prism: int) -> dict:
        """Figures of the stack holding ``prism``: layers, extent, orientation."""
        s = self.structure
        prism = int(prism)
        if not 0 <= prism < len(s):
            raise OptionError(f"prism {prism} out of range 0..{len(s) - 1}", param="prism")
        res = stacking_result(s, self.cache)
        k = int(res.stack[prism])
        st = res.stacks
        nrm = np.asarray(st["normal"][k], float)
        d = director_of(s, self.cache)
        ang = math.degrees(math.acos(min(1.0, abs(float(nrm @ d)))))
        out = {"prism": prism, "stack": k, "layers": int(st["layers"][k]),
               "prisms": int(st["prisms"][k]), "stacking_number": int(res.stacking_number[prism]),
               "lateral_diameter": float(st["lateral_diameter"][k]),
               "thickness": float(st["thickness"][k]), "normal": nrm.tolist(),
               "director_angle": ang, "centroid": np.asarray(st["centroid"][k]).tolist(),
               "wall_angle": float(st["wall_angle"][k])}
        for name, col in s.columns.items():
            out.setdefault(f"column {name}", col[prism].item())
        return out

    def pick_prism(self, prism: int | None) -> str:
        """Show the figures of ``prism``'s stack in the text panel; returns the text.

        ``None`` clears the panel."""
        if prism is None:
            self.picked, self.panel_text = None, ""
        else:
            f = self.stack_figures(prism)
            self.picked = f["prism"]
            lines = [f"prism {f['prism']} in stack {f['stack']}",
                     f"{f['layers']} layers, {f['prisms']} prisms; "
                     f"this prism's column: {f['stacking_number']} layers",
                     f"across {f['lateral_diameter']:.3g} nm, thick {f['thickness']:.3g} nm",
                     f"normal {_fmt_vec(f['normal'])}, {f['director_angle']:.1f} deg "
                     f"from the director",
                     f"centre {_fmt_vec(f['centroid'])} nm"]
            if math.isfinite(f["wall_angle"]):
                lines.append(f"{f['wall_angle']:.1f} deg between its normal and the wall's")
            self.panel_text = "\n".join(lines)
        if self.plotter is not None:
            self.plotter.add_text(self.panel_text, position="upper_left", font_size=9,
                                  color=TEXT_COLOUR, name="panel")
            self._render()
        return self.panel_text

    def pick_at(self, x: float, y: float) -> int | None:
        """Pick the prism under display position ``(x, y)`` (pixels) and show its figures."""
        if self.plotter is None:
            return None
        import vtk
        picker = vtk.vtkCellPicker()
        picker.SetTolerance(0.0005)
        picker.PickFromListOn()
        picker.AddPickList(self.plotter.actors["prisms"])
        picker.Pick(float(x), float(y), 0.0, self.plotter.renderer)
        cell = picker.GetCellId()
        prism = None if cell < 0 else cell // CELLS_PER_PRISM
        self.pick_prism(prism)
        return prism

    def save_screenshot(self, path=None, force: bool = False) -> Path:
        """Save the current picture as PNG (default ``STEM_view_NNN.png``, the first free
        number); written through :func:`sheetview.io.output.atomic_path`."""
        if self.plotter is None:
            raise SheetviewError("no picture to save: the scene is not drawn")
        if path is None:
            k = 1
            while Path(f"{self.screenshot_stem}_view_{k:03d}.png").exists():
                k += 1
            path = Path(f"{self.screenshot_stem}_view_{k:03d}.png")
        img = self.plotter.screenshot(return_img=True)
        write_png(img, path, force=force)
        self.saved.append(Path(path))
        self.status = f"saved {path}"
        self._update_status(extra=f"saved {path}")
        return Path(path)

    # -------------------------------------------------------------- drawing
    def attach(self, plotter) -> None:
        """Draw the scene into ``plotter`` (off-screen or a window)."""
        import vtk

        self.plotter = plotter
        plotter.set_background(BACKGROUND)
        self._clip = vtk.vtkPlane()
        self._draw_prisms()
        plotter.add_mesh(outline_mesh(self.structure.domain), color=OUTLINE_COLOUR, line_width=1.5,
                         name="outline", pickable=False, lighting=False)
        plotter.actors["outline"].SetVisibility(self.outline_on)
        self._draw_section()
        self._draw_legend()
        self._update_status()

    def _render(self):
        if self.plotter is not None and getattr(self.plotter, "ren_win", None) is not None:
            self.plotter.render()

    def _apply_clip(self):
        if self.plotter is None or "prisms" not in self.plotter.actors:
            return
        mapper = self.plotter.actors["prisms"].GetMapper()
        mapper.RemoveAllClippingPlanes()
        if self.section_on:
            # keep the side n . (x - o) <= 0: VTK keeps where the plane function is >= 0
            self._clip.SetOrigin(*self.plane_origin)
            self._clip.SetNormal(*(-self.plane_normal))
            mapper.AddClippingPlane(self._clip)

    def _draw_prisms(self):
        p = self.plotter
        if p is None:
            return
        import pyvista as pv
        from matplotlib.colors import ListedColormap

        dsp = self.display
        lut = pv.LookupTable(cmap=ListedColormap(dsp.colours), n_values=len(dsp.colours),
                             scalar_range=dsp.clim)
        lut.nan_color = NAN_COLOUR
        for title in list(p.scalar_bars.keys()):
            p.remove_scalar_bar(title)
        bar = None
        if dsp.title and self.decorations:
            wh = max(int(p.window_size[1]), 1)
            bar = dict(title=dsp.title, n_labels=dsp.n_labels, fmt=dsp.fmt, vertical=False,
                       position_x=0.52, position_y=max(0.5, 1.0 - 80.0 / wh), width=0.44,
                       height=min(0.3, 70.0 / wh),
                       color=TEXT_COLOUR, title_font_size=12, label_font_size=10)
            if self.colouring.kind == "integer":
                lo, hi = int(round(dsp.clim[0] + 0.5)), int(round(dsp.clim[1] - 0.5))
                stride = max(1, int(math.ceil((hi - lo + 1) / 10)))
                lut.annotations = {float(k): str(k) for k in range(lo, hi + 1, stride)}
                bar["n_labels"] = 0
        p.add_mesh(self.mesh, scalars="value", cmap=lut, clim=dsp.clim, name="prisms",
                   preference="cell", show_scalar_bar=bar is not None, scalar_bar_args=bar,
                   lighting=self.lighting, nan_color=NAN_COLOUR, show_edges=False,
                   interpolate_before_map=False)
        self._apply_clip()
        self._draw_legend()

    def _draw_section(self):
        p = self.plotter
        if p is None:
            return
        if "section" in p.actors:
            p.remove_actor("section")
        self._apply_clip()
        if not self.section_on or self.section is None:
            self._render()
            return
        lo, hi = self.bounds
        lift = 1e-4 * float(np.linalg.norm(hi - lo))
        mesh = section_mesh(self.section, self.visible_phases, lift=lift,
                            opacity=PHASE_OPACITY if self.see_through else None)
        if mesh.n_cells:
            p.add_mesh(mesh, scalars="phase_colour", rgb=True, name="section", lighting=False,
                       pickable=False, preference="cell")
        self._render()

    def _draw_legend(self):
        p = self.plotter
        if p is None or not self.decorations:
            return
        entries = []
        if self.section_on:
            present = set()
            if self.section is not None:
                present = set(np.unique(self.section.labels).tolist())
            for code in PHASE_ORDER:
                if code in present or code == SOLID:
                    word = PHASE_LABELS[code] + ("" if code in self.visible_phases else " (hidden)")
                    entries.append((word, colour_rgb(PHASE_COLOURS[code])))
        for label, colour in self.display.legend:
            entries.append((label, np.asarray(colour, float)))
        for name in [k for k in p.actors if k.startswith("legend_")]:
            p.remove_actor(name)
        w, h = p.window_size
        dy = min(0.05, 18.0 / max(h, 1))
        y0 = 0.5 + 0.5 * dy * len(entries)
        side = 0.7 * dy
        for i, (label, rgb) in enumerate(entries):
            y = y0 - (i + 1) * dy
            p.add_actor(_square_actor(0.01, y, side * h / max(w, 1), side, rgb),
                        name=f"legend_sq_{i}", pickable=False)
            p.add_text(label, position=(0.01 + 1.6 * side * h / max(w, 1), y), viewport=True,
                       font_size=8, color=TEXT_COLOUR, name=f"legend_tx_{i}")

    def _update_status(self, extra: str | None = None):
        n = self.plane_normal
        o = self.plane_origin
        axis = int(np.argmax(np.abs(n)))
        if self.section_on:
            if abs(abs(n[axis]) - 1.0) < 1e-9:
                where = f"cut at {'xyz'[axis]} = {o[axis]:.3g} nm"
            else:
                where = f"cut through {_fmt_vec(o)} nm facing {_fmt_vec(n)}"
            where += f", step {self.step:.3g} nm"
        else:
            where = "no cut"
        text = f"colour: {_unit_label(self.colouring.label, self.colouring.unit)};  {where}"
        if self.display.note:
            text += f";  {self.display.note}"
        if extra:
            text += f";  {extra}"
        self.status = text
        if self.plotter is not None and self.decorations:
            self.plotter.add_text(text, position="lower_left", font_size=8, color=TEXT_COLOUR,
                                  name="status")
            self._render()

    def _sync_widget(self):
        w = self._plane_widget
        if w is not None:
            w.SetNormal(*self.plane_normal)
            w.SetOrigin(*self.plane_origin)

    # ------------------------------------------------------------- window
    def bind_keys(self, plotter) -> None:
        """Key bindings (:data:`KEYS`), the plane widget and right-click picking."""
        for key, (meth, arg, _) in KEYS.items():
            fn = getattr(self, meth)
            plotter.add_key_event(key, (lambda f=fn, a=arg: f() if a is None else f(a)))
        lo, hi = self.bounds

        def on_widget(normal, origin):
            self.plane_normal = plane_basis(normal)[0]
            self.plane_origin = np.asarray(origin, float)
            if self.section_on:
                self.update_section()
            self._update_status()

        self._plane_widget = plotter.add_plane_widget(
            on_widget, normal=tuple(self.plane_normal), origin=tuple(self.plane_origin),
            bounds=(lo[0], hi[0], lo[1], hi[1], lo[2], hi[2]), factor=1.05,
            color=OUTLINE_COLOUR, outline_translation=False, implicit=True,
            interaction_event="end")
        plotter.track_click_position(lambda pos: self.pick_at(*pos[:2]), side="right",
                                     viewport=True)
        help_lines = [w for (_, _, w) in KEYS.values() if w] + [PICK_HINT]
        plotter.add_text("\n".join(help_lines), position="lower_right", font_size=7,
                         color=TEXT_COLOUR, name="help")

    def margins(self, size=(800, 600)) -> dict:
        """Parts of the window (fractions of its width and height) kept free of the
        structure for the decorations: the colour bar on top, the legend on the left, the
        status line and the scale bar at the bottom."""
        w, h = (max(int(v), 1) for v in size)
        if not self.decorations:
            return {"top": 0.02, "bottom": 0.02, "left": 0.02, "right": 0.02}
        top = min(0.3, 92.0 / h) if self.display.title else 0.03
        n_legend = len(self.display.legend) + (4 if self.section_on else 0)
        left = min(0.25, 190.0 / w) if n_legend else 0.02
        bottom = min(0.2, 58.0 / h)
        return {"top": top, "bottom": bottom, "left": left, "right": 0.02}

    def content_points(self) -> np.ndarray:
        """Points whose picture must fit the window: the prisms' corners and the traced
        outline of the domain."""
        pts = [np.asarray(self.mesh.points, float)]
        try:
            pts.append(np.asarray(outline_mesh(self.structure.domain).points, float))
        except Exception:  # noqa: BLE001  # an outline is only decoration
            pass
        return np.concatenate([p.reshape(-1, 3) for p in pts if p.size])

    def _extent(self, view: str):
        """``(centre, right, up, half_w, half_h, d, up_vector)`` of the content seen from
        ``view`` (parallel projection)."""
        d, up = camera_direction(view, self.plane_normal)
        lo, hi = self.bounds
        c = 0.5 * (lo + hi)
        right = np.cross(-d, up)
        right /= np.linalg.norm(right)
        upv = np.cross(right, -d)
        pts = self.content_points() - c
        u, v = pts @ right, pts @ upv
        ulo, uhi, vlo, vhi = float(u.min()), float(u.max()), float(v.min()), float(v.max())
        centre = c + 0.5 * (ulo + uhi) * right + 0.5 * (vlo + vhi) * upv
        return (centre, right, upv, max(0.5 * (uhi - ulo), 1e-9), max(0.5 * (vhi - vlo), 1e-9),
                d, up)

    def fitted_size(self, view: str, width: int) -> tuple[int, int]:
        """``(width, height)``: the picture height at which the structure seen from
        ``view`` fills the free part of the window in both directions (between 0.45 and
        1.6 times the width)."""
        *_, half_w, half_h, _, _ = self._extent(view)
        h = 0.75 * width
        for _ in range(3):
            m = self.margins((width, h))
            fw = 1.0 - m["left"] - m["right"]
            fh = 1.0 - m["top"] - m["bottom"]
            # width / height such that the scale set by the height equals that by the width
            h = width * (half_h / fh) / (half_w / fw)
            h = min(max(h, 0.45 * width), 1.6 * width)
        return int(width), int(round(h))

    def camera(self, view: str = "iso", size=(800, 600)) -> None:
        """Point the camera: ``iso``, ``cut`` (facing the cut, tilted), ``+x`` ... ``-z``
        (from that side), parallel projection. The picture of the prisms and the domain's
        outline is fitted to the part of the window the decorations leave free
        (:meth:`margins`), with 3 % to spare; :attr:`nm_per_pixel` is its scale."""
        p = self.plotter
        centre, right, upv, half_w, half_h, d, up = self._extent(view)
        lo, hi = self.bounds
        dist = 3.0 * float(np.linalg.norm(hi - lo))
        m = self.margins(size)
        fw = max(1.0 - m["left"] - m["right"], 0.3)
        fh = max(1.0 - m["top"] - m["bottom"], 0.3)
        aspect = size[0] / size[1]
        scale = 1.03 * max(half_h / fh, half_w / (aspect * fw))
        # put the content's centre at the centre of the free part of the window
        dx = (m["left"] - m["right"]) * scale * aspect
        dy = (m["bottom"] - m["top"]) * scale
        focal = centre - dx * right - dy * upv
        cam = p.camera
        cam.focal_point = tuple(focal)
        cam.position = tuple(focal + dist * d)
        cam.up = tuple(up)
        cam.parallel_projection = True
        p.renderer.ResetCameraClippingRange()
        cam.parallel_scale = scale
        cam.clipping_range = (0.01 * dist, 3.0 * dist)
        self.nm_per_pixel = 2.0 * scale / size[1]
        self.view = view

    def draw_scale_bar(self, size=(800, 600)) -> float:
        """A scale bar of a round length in the lower right corner, above the status line
        (after :meth:`camera`: parallel projection, so it measures every length across the
        line of sight). Returns its length in nm."""
        p = self.plotter
        w, h = (int(v) for v in size)
        px = self.nm_per_pixel
        bar = nice_length(0.8 * w * px)
        bw = bar / px / w
        bh = max(4.0, 0.008 * h) / h
        x1 = 1.0 - max(0.02, 12.0 / w)
        y0 = 24.0 / h  # above the status line
        p.add_actor(_square_actor(x1 - bw, y0, bw, bh, colour_rgb(TEXT_COLOUR)),
                    name="scale_bar", pickable=False)
        label = f"{bar:g} nm"
        p.add_text(label, position=((x1 - bw / 2) * w - 3.5 * len(label), (y0 + bh) * h + 3),
                   font_size=9, color=TEXT_COLOUR, name="scale_bar_label")
        return bar


CAMERA_VIEWS = ("iso", "cut", "+x", "-x", "+y", "-y", "+z", "-z")


def camera_direction(view: str, plane_normal=(0.0, 0.0, 1.0)):
    """Unit vector from the focal point towards the camera, and the view-up vector."""
    view = str(view).lower()
    if view == "iso":
        d = np.array([1.0, -1.2, 0.9])
    elif view == "cut":
        n, u, v = plane_basis(plane_normal)
        d = n + 0.35 * u - 0.25 * v
    elif len(view) == 2 and view[0] in "+-" and view[1] in "xyz":
        d = np.zeros(3)
        d["xyz".index(view[1])] = 1.0 if view[0] == "+" else -1.0
    else:
        raise OptionError(f"unknown camera {view!r}; choose one of {', '.join(CAMERA_VIEWS)}",
                          param="camera")
    d = d / np.linalg.norm(d)
    up = np.array([0.0, 0.0, 1.0])
    if abs(d @ up) > 0.95:
        up = np.array([0.0, 1.0, 0.0])
    up = up - (up @ d) * d
    return d, up / np.linalg.norm(up)


# ============================================================================ pictures
def write_png(img: np.ndarray, path, force: bool = False) -> Path:
    """Write an RGB(A) uint8 image as PNG through :func:`atomic_path`."""
    from matplotlib.image import imsave


    with atomic_path(path, force) as tmp:
        imsave(str(tmp), np.ascontiguousarray(img), format="png")
    return Path(path)


def parse_size(text) -> tuple[int, int | None]:
    """``"800x600"`` -> (800, 600); ``"1200"`` -> (1200, None): the height follows the
    structure's shape (:func:`render`)."""
    parts = str(text).lower().replace(",", "x").split("x")
    try:
        w, h = (int(v) for v in parts) if len(parts) == 2 else (int(parts[0]), None)
    except ValueError:
        raise OptionError(f"--size: expected WIDTHxHEIGHT in pixels such as 800x600, or a "
                          f"width alone, got {text!r}", param="size") from None
    if h is None and 16 <= w <= 8192:
        return w, None
    if not (16 <= w <= 8192 and h is not None and 16 <= h <= 8192):
        raise OptionError(f"--size: width and height must be 16 to 8192 pixels, got {text!r}",
                          param="size")
    return w, h


def slice_plane(domain, *, axis=None, at=None, normal=None, origin=None):
    """A section plane from either ``axis`` (x, y, z) and ``at`` (nm) or ``normal`` and
    ``origin`` (three numbers each); None when none is given. Missing positions default to
    the domain's centre."""
    lo, hi = (np.asarray(b, float) for b in domain.bounds)
    centre = 0.5 * (lo + hi)
    if axis is not None and normal is not None:
        raise OptionError("give the plane either by <<axis>>/<<at>> or by <<normal>>/<<origin>>, "
                          "not both", param="normal")
    if axis is None and normal is None:
        if at is not None or origin is not None:
            raise OptionError("<<at>> needs <<axis>> and <<origin>> needs <<normal>>",
                              param="at" if at is not None else "origin")
        return None
    if axis is not None:
        if origin is not None:
            raise OptionError("<<origin>> goes with <<normal>>; with <<axis>> give the position "
                              "by <<at>>", param="origin")
        a = "xyz".index(str(axis).lower())
        n = np.zeros(3)
        n[a] = 1.0
        o = centre.copy()
        if at is not None:
            o[a] = float(at)
        return o, n
    if at is not None:
        raise OptionError("<<at>> goes with <<axis>>; with <<normal>> give <<origin>>",
                          param="at")
    n = parse_vector(normal, "<<normal>>")
    o = centre if origin is None else parse_vector(origin, "<<origin>>")
    return o, plane_basis(n)[0]


def render(structure, path=None, *, colour_by: str = "stacking", plane=None, grid=None,
           voxel_size=None, camera: str | None = None, size=(800, 600), force: bool = False,
           lighting: bool = True, decorations: bool = True, cache: dict | None = None,
           scene: Scene | None = None, caption: str | None = None,
           scale_bar: bool = True) -> np.ndarray:
    """Draw the scene off-screen; write a PNG to ``path`` (if given); return the image.

    Parameters
    ----------
    structure : Structure
    path : str or Path, optional
        PNG to write (through :func:`atomic_path`; refused if it exists unless ``force``).
    colour_by : str
        Colouring (:data:`COLOURINGS`).
    plane : (origin, normal), optional
        Cut the prisms at this plane and show the phase section on it.
    grid, voxel_size
        Phase grid for the section (rasterized at ``voxel_size`` if not given).
    camera : str, optional
        One of :data:`CAMERA_VIEWS`; default ``cut`` with a plane, ``iso`` without.
    size : (width, height) in pixels; a height of None (or 0) follows the structure's
        shape (:meth:`Scene.fitted_size`)
    lighting : bool
        False draws flat, unshaded colours (exact colormap colours).
    decorations : bool
        Scalar bar, legend and status line.
    caption : str, optional
        Added to the status line (the moment of growth drawn, for instance).
    scale_bar : bool
        With decorations: a scale bar (lower right). The picture is a parallel projection,
        so the bar holds for every length across the line of sight; the status line says so.

    The structure and the domain's outline are fitted to the part of the picture the
    decorations leave free (:meth:`Scene.camera`).

    Returns
    -------
    (height, width, 3) uint8 array
    """
    import pyvista as pv


    if path is not None:
        check_writable(path, force)  # fail before the work
    w, h = size
    if scene is None:
        scene = Scene(structure, colour_by=colour_by, grid=grid, voxel_size=voxel_size,
                      plane=plane, section=plane is not None, lighting=lighting,
                      decorations=decorations, cache=cache)
    view = camera or ("cut" if scene.section_on else "iso")
    camera_direction(view, scene.plane_normal)  # validate before opening a window
    if not h:
        w, h = scene.fitted_size(view, int(w))
    p = pv.Plotter(off_screen=True, window_size=(int(w), int(h)))  # no global flag set
    try:
        p.disable_anti_aliasing()
        scene.attach(p)
        scene.camera(view, (w, h))
        extra = [caption] if caption else []
        if decorations and scale_bar:
            bar = scene.draw_scale_bar((w, h))
            extra.append(f"parallel projection: the {bar:g} nm bar holds across the line "
                         "of sight")
        if extra:
            scene._update_status(extra="; ".join(extra))
        img = p.screenshot(return_img=True)
    finally:
        scene.plotter = None
        p.close()
    img = np.asarray(img)[..., :3].copy()
    if path is not None:
        write_png(img, path, force=force)
    return img


# ====================================================================== contact sheet
@dataclass
class SheetLayout:
    """Where the panels of a contact sheet are in its PNG.

    ``boxes[k] = (row0, row1, col0, col1)`` pixel bounds (image rows from the top) of
    panel ``k``'s image area; ``positions`` the section positions (nm) along ``axis``;
    ``extent[k] = (h0, h1, v0, v1)`` the nm range of the panel's horizontal and vertical
    axes (``h_axis``, ``v_axis``).
    """

    axis: str
    positions: np.ndarray
    indices: np.ndarray
    boxes: list
    extent: tuple
    h_axis: str
    v_axis: str
    size: tuple
    scale_bar_nm: float
    path: Path | None = None
    figure: object = None  # the matplotlib Figure (for notebooks)


#: Panel axes of each section axis: (horizontal, vertical); z is kept vertical where possible.
PANEL_AXES = {"x": ("y", "z"), "y": ("x", "z"), "z": ("x", "y")}


def section_positions(grid, axis: str, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Voxel indices and centre positions (nm) of ``count`` sections along ``axis``,
    at the middles of ``count`` equal slabs of the grid."""
    a = "xyz".index(axis)
    n = grid.shape[a]
    idx = np.minimum(n - 1, np.floor((np.arange(count) + 0.5) * n / count).astype(np.int64))
    return idx, grid.axis_centers(a)[idx]


def nice_length(span: float) -> float:
    """A round length (1, 2 or 5 times a power of ten) close to a quarter of ``span``."""
    target = span / 4.0
    if not target > 0:
        return 1.0
    e = math.floor(math.log10(target))
    best = 1.0
    for m in (1.0, 2.0, 5.0, 10.0):
        if m * 10 ** e <= target * 1.2:
            best = m * 10 ** e
    return best


def contact_sheet(grid, path=None, *, axis: str = "z", count: int = 9, force: bool = False,
                  panel_px: int = 260, title: str | None = None) -> SheetLayout:
    """Draw ``count`` axis-aligned sections of a PhaseGrid side by side (matplotlib Agg).

    Each panel shows the phases of one voxel layer, labelled with its position in nm,
    with a scale bar in the first panel and a phase legend below. The PNG is written to
    ``path`` through :func:`atomic_path`.

    Returns
    -------
    SheetLayout
        Panel positions in the picture (to read pixels back) and the nm of each axis.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Patch


    axis = str(axis).lower()
    if axis not in PANEL_AXES:
        raise OptionError(f"--axis must be x, y or z, got {axis!r}", param="axis")
    try:
        count = int(count)
    except (TypeError, ValueError):
        raise OptionError(f"--count must be a whole number, got {count!r}", param="count") from None
    a = "xyz".index(axis)
    if not 1 <= count <= min(100, grid.shape[a]):
        raise OptionError(f"--count must be between 1 and {min(100, grid.shape[a])} (the grid "
                          f"has {grid.shape[a]} voxel layers along {axis}), got {count}",
                          param="count")
    if path is not None:
        check_writable(path, force)
    idx, pos = section_positions(grid, axis, count)
    ha, va = PANEL_AXES[axis]
    hi_, vi_ = "xyz".index(ha), "xyz".index(va)
    lo, hi = grid_bounds(grid)
    ext = (lo[hi_], hi[hi_], lo[vi_], hi[vi_])
    wnm, hnm = ext[1] - ext[0], ext[3] - ext[2]
    ncol = int(math.ceil(math.sqrt(count)))
    nrow = int(math.ceil(count / ncol))
    dpi = 100
    pw = panel_px / dpi
    ph = pw * hnm / wnm
    if ph > 2.5 * pw:
        ph = 2.5 * pw
    mx, top, gap, bottom = 0.35, 0.55 if title else 0.25, 0.45, 0.75
    fw = ncol * pw + (ncol - 1) * 0.2 + 2 * mx
    fh = nrow * ph + (nrow - 1) * gap + top + bottom + 0.3
    fig = Figure(figsize=(fw, fh), dpi=dpi, facecolor=BACKGROUND)
    FigureCanvasAgg(fig)
    axes = []
    bar = nice_length(wnm)
    for k in range(count):
        r, c = divmod(k, ncol)
        left = (mx + c * (pw + 0.2)) / fw
        bot = (fh - top - 0.3 - (r + 1) * ph - r * gap) / fh
        ax = fig.add_axes([left, bot, pw / fw, ph / fh])
        sl = np.take(grid.labels, idx[k], axis=a)  # 2D, remaining axes in order
        # remaining axes are in increasing order; put ha horizontal, va vertical
        rem = [i for i in range(3) if i != a]
        if rem.index(hi_) == 0:
            img = sl.T  # rows = vertical axis
        else:
            img = sl
        ax.imshow(section_rgb(img), origin="lower", extent=ext, interpolation="nearest",
                  resample=False, aspect="auto")
        ax.set_xticks([])
        ax.set_yticks([])
        for sp in ax.spines.values():
            sp.set_visible(False)
        ax.set_title(f"{axis} = {pos[k]:.2f} nm", fontsize=9, color=TEXT_COLOUR, pad=3)
        axes.append(ax)
        if k == 0:
            ax.text(1.0, -0.03, f"across: {ha}, up: {va}", transform=ax.transAxes,
                    fontsize=7, color=TEXT_COLOUR, va="top", ha="right")
    # scale bar below the first panel
    ax0 = axes[0]
    ax0.annotate("", xy=(ext[0] + bar, -0.09), xytext=(ext[0], -0.09),
                 xycoords=("data", "axes fraction"), textcoords=("data", "axes fraction"),
                 arrowprops=dict(arrowstyle="-", lw=2.5, color=TEXT_COLOUR, shrinkA=0, shrinkB=0),
                 annotation_clip=False)
    ax0.text(ext[0] + bar / 2, -0.12, f"{bar:g} nm", transform=ax0.get_xaxis_transform(),
             ha="center", va="top", fontsize=8, color=TEXT_COLOUR)
    present = set(np.unique(grid.labels).tolist())
    handles = [Patch(facecolor=PHASE_COLOURS[c], edgecolor="none", label=PHASE_LABELS[c])
               for c in PHASE_ORDER if c in present]
    fig.legend(handles=handles, loc="lower center", ncol=len(handles), frameon=False,
               fontsize=8, bbox_to_anchor=(0.5, 0.0))
    if title:
        fig.suptitle(title, fontsize=10, color=TEXT_COLOUR, y=1 - 0.12 / fh)
    W, H = fig.canvas.get_width_height()
    fig.canvas.draw()
    boxes = []
    for ax in axes:
        bb = ax.get_window_extent()
        boxes.append((int(round(H - bb.y1)), int(round(H - bb.y0)),
                      int(round(bb.x0)), int(round(bb.x1))))
    layout = SheetLayout(axis, pos, idx, boxes, ext, ha, va, (H, W), bar,
                         None if path is None else Path(path), fig)
    if path is not None:
        with atomic_path(path, force) as tmp:
            fig.savefig(str(tmp), format="png", dpi=dpi, facecolor=BACKGROUND)
    return layout


# ============================================================================= export
#: Computed per-prism arrays added on export: column name -> colouring key.
EXPORT_COLUMNS = {"stack": "stack", "stacking_number": "stacking", "local_order": "order",
                  "director_angle": "director", "wall_angle": "wall"}


def export(structure, folder, *, grid=None, voxel_size=None, stem: str | None = None,
           columns=None, with_grid: bool = True, force: bool = False,
           cache: dict | None = None) -> list[Path]:
    """Write the prisms with every per-prism array, and the phase grid, for
    general-purpose viewers.

    Writes ``FOLDER/STEM_prisms.vtp`` (the structure's columns plus the computed
    ``stack``, ``stacking_number``, ``local_order``, ``director_angle`` (deg),
    ``wall_angle`` (deg) where they apply; a computed name already used by a column gets
    the prefix ``computed_``) through :func:`sheetview.io.write`, and, with
    ``with_grid``, ``FOLDER/STEM_phases.vti`` (the rasterized PhaseGrid).

    Returns the paths written.
    """

    folder = Path(folder)
    if not folder.is_dir():
        raise OptionError(f"export folder {str(folder)!r} does not exist", param="export")
    if stem is None:
        stem = Path(structure.source).stem if structure.source else "structure"
    cache = {} if cache is None else cache
    keys = available_colourings(structure)
    wanted = EXPORT_COLUMNS if columns is None else {c: EXPORT_COLUMNS[c] for c in columns}
    targets = [folder / f"{stem}_prisms.vtp"]
    if with_grid:
        targets.append(folder / f"{stem}_phases.vti")
    for t in targets:
        check_writable(t, force)
    cols = dict(structure.columns)
    for name, key in wanted.items():
        if key not in keys:
            continue
        vals = scalars_for(structure, key, cache).values
        out = name if name not in cols else f"computed_{name}"
        cols[out] = np.asarray(vals)
    s2 = Structure(structure.vertices, structure.thickness, structure.domain, structure.spacing,
                   cols, structure.metadata, structure.source)
    written = [write(s2, targets[0], force=force)]
    if with_grid:
        g = grid if grid is not None else phase_grid(structure, voxel_size, cache)
        written.append(write(g, targets[1], force=force))
    return [Path(p) for p in written]


# ============================================================================= window
def check_display() -> None:
    """Raise :class:`SheetviewError` unless a window can be opened here."""
    hint = ("draw pictures without a window instead: `sheetview render FILE -o OUT.png` "
            "for the 3D scene, `sheetview slices FILE -o OUT.png` for sections")
    if sys.platform.startswith("linux") and not (os.environ.get("DISPLAY")
                                                 or os.environ.get("WAYLAND_DISPLAY")):
        raise SheetviewError(f"no display to open a window on (DISPLAY is not set); {hint}")
    try:
        import pyvista as pv
        ok = pv.system_supports_plotting()
    except Exception:  # noqa: BLE001 - any failure means no window
        ok = False
    if not ok:
        raise SheetviewError(f"this system cannot open a plotting window; {hint}")


def open_window(scene: Scene, *, size=(1200, 850), title: str = "sheetview") -> None:
    """Open the interactive window on ``scene`` (blocks until it is closed)."""
    import pyvista as pv

    check_display()
    try:
        p = pv.Plotter(window_size=size, title=title)
    except Exception as e:  # noqa: BLE001
        raise SheetviewError(f"could not open a window ({e}); draw pictures instead with "
                             "`sheetview render` or `sheetview slices`") from None
    scene.attach(p)
    scene.bind_keys(p)
    scene.camera("cut" if scene.section_on else "iso", size)
    p.camera.parallel_projection = False
    p.reset_camera()
    p.show()
