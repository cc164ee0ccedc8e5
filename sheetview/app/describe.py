"""A quick description of what was read: the facts behind ``sheetview info``.

Pure functions of the object read; no file access, no printing.
"""
from __future__ import annotations

import numpy as np

from ..grid import PhaseGrid
from ..particles import ParticleSet
from ..structure import Structure, SurfaceBody


def _stats(a: np.ndarray) -> dict:
    if a.size == 0:
        return {"min": None, "mean": None, "max": None}
    return {"min": float(a.min()), "mean": float(a.mean()), "max": float(a.max())}


def _order(normals: np.ndarray, weights: np.ndarray) -> dict:
    """Volume-weighted nematic order of the sheet normals: the largest eigenvalue S of
    Q = sum w (3 n n^T - I) / 2 / sum w and its eigenvector (the director)."""
    w = weights / weights.sum()
    q = 1.5 * np.einsum("i,ij,ik->jk", w, normals, normals) - 0.5 * np.eye(3)
    vals, vecs = np.linalg.eigh(q)
    d = vecs[:, -1]
    d = d * np.sign(d[np.argmax(np.abs(d))])
    return {"S": float(vals[-1]), "director": d.tolist()}


def _domain_dict(dom) -> dict:
    d = dom.to_dict()
    d["volume_nm3"] = dom.volume
    d["inferred"] = bool(dom.inferred)
    return d


def describe(obj) -> dict:
    """A JSON-ready description of a Structure, SurfaceBody or PhaseGrid, with warnings."""
    if isinstance(obj, Structure):
        return _describe_structure(obj)
    if isinstance(obj, SurfaceBody):
        return _describe_body(obj)
    if isinstance(obj, PhaseGrid):
        return _describe_grid(obj)
    if isinstance(obj, ParticleSet):
        return _describe_particles(obj)
    raise TypeError(f"cannot describe {type(obj).__name__}")


def _describe_structure(s: Structure) -> dict:
    warnings = []
    dom = s.domain
    if dom.inferred:
        warnings.append("the file gives no domain: using the padded bounding box of the prisms "
                        "(largest thickness + 1.4 nm on every side)")
    out = s.outside_counts()
    if out["wholly_outside"]:
        warnings.append(f"{out['wholly_outside']} prism(s) lie wholly outside the domain")
    if out["partly_outside"]:
        warnings.append(f"{out['partly_outside']} prism(s) cross the domain wall")
    dup = s.duplicate_count()
    if dup:
        warnings.append(f"{dup} prism(s) repeat the triangle of an earlier prism (duplicates)")
    lo, hi = s.bounds()
    order = _order(s.normals, s.volumes) if len(s) else None
    cols = {}
    for name, arr in s.columns.items():
        cols[name] = _stats(arr.astype(float))
        if arr.dtype.kind in "iu":
            cols[name]["distinct"] = int(len(np.unique(arr)))
    return {
        "kind": "prisms",
        "source": s.source,
        "n_prisms": len(s),
        "domain": _domain_dict(dom),
        "bounds_nm": {"min": lo.tolist(), "max": hi.tolist()},
        "spacing_nm": s.spacing,
        "thickness_nm": _stats(s.thickness),
        "area_nm2": _stats(s.areas),
        "edge_nm": _stats(s.edge_lengths.ravel()),
        "total_prism_volume_nm3": s.total_volume,
        "prism_volume_fraction_of_domain": s.total_volume / dom.volume,
        "columns": cols,
        "metadata": s.metadata,
        "orientation": order,
        "outside": out,
        "duplicates": dup,
        "warnings": warnings,
    }


def _describe_particles(p: ParticleSet) -> dict:
    lo, hi = p.bounds()
    warnings = []
    if p.domain.inferred:
        warnings.append("the file gives no domain: using the padded bounding box of the "
                        "particles (1.4 nm on every side)")
    return {
        "kind": f"particles ({p.kind})",
        "source": p.source,
        "n_particles": len(p),
        "domain": _domain_dict(p.domain),
        "bounds_nm": {"min": lo.tolist(), "max": hi.tolist()},
        "semi_axes_nm": _stats(p.semi_axes.ravel()),
        "total_particle_volume_nm3": p.volume,
        "total_particle_surface_nm2": p.area,
        "particle_volume_fraction_of_domain": p.volume_fraction(),
        "columns": {k: _stats(v.astype(float)) for k, v in p.columns.items()},
        "metadata": p.metadata,
        "warnings": warnings,
    }


def _describe_body(b: SurfaceBody) -> dict:
    lo = b.vertices.min(axis=0) if len(b.vertices) else np.zeros(3)
    hi = b.vertices.max(axis=0) if len(b.vertices) else np.zeros(3)
    return {
        "kind": "solid body",
        "source": b.source,
        "n_vertices": int(len(b.vertices)),
        "n_faces": b.n_faces,
        "volume_nm3": b.volume,
        "area_nm2": b.area,
        "bounds_nm": {"min": lo.tolist(), "max": hi.tolist()},
        "domain": _domain_dict(b.domain),
        "metadata": b.metadata,
        "warnings": ["the file gives no domain: using the padded bounding box"] if b.domain.inferred else [],
    }


def _describe_grid(g: PhaseGrid) -> dict:
    return {
        "kind": "volume",
        "source": g.source,
        "shape": list(g.shape),
        "voxel_size_nm": list(g.spacing),
        "origin_nm": list(g.origin),
        "extent_nm": g.extent.tolist(),
        "periodic": g.periodic,
        "phase_fractions": g.fractions(),
        "metadata": g.metadata,
        "warnings": [],
    }
