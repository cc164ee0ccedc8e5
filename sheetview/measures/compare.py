"""A structure's virtual micrographs beside a real one: pooled 2D descriptors and the
distances between their distributions.

Two distributions are compared by

* the two-sample Kolmogorov–Smirnov statistic D = sup |F_a - F_b| (Kolmogorov 1933;
  Smirnov 1948) of the weighted empirical CDFs, with an asymptotic p-value
  (:func:`weighted_ks`; equal to :func:`scipy.stats.ks_2samp`'s D for unit weights);
* the first Wasserstein (earth mover's) distance W1 = integral |F_a - F_b| dx, in nm
  (Vaserstein 1969), via :func:`scipy.stats.wasserstein_distance` with the sample weights.

Chord samples carry the edge-correction weights of :mod:`sheetview.measures.planar`;
local-thickness samples weigh one per pixel.

The p-value assumes independent samples. Chords along neighbouring rows and per-pixel
local thickness values are strongly correlated, so the p-value overstates the evidence:
read D and W1 as distances and the p-value as a rough guide only.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..errors import OptionError
from .sections import AXES, centre_and_span, projection, section, segment_projection

#: Distributions compared (keys of PlanarDescriptors.distributions()).
DISTRIBUTIONS = ("chord_solid", "chord_pore", "thickness_solid", "thickness_pore")


def weighted_ks(a, b, wa=None, wb=None) -> tuple[float, float]:
    """Two-sample Kolmogorov-Smirnov statistic of weighted samples,
    D = max |F_a(x) - F_b(x)| over all sample points with weighted empirical CDFs, and its
    p-value from the Kolmogorov distribution at the effective sample sizes
    n = (sum w)^2 / sum w^2 (Kish, Survey Sampling, Wiley 1965). With unit weights D equals
    :func:`scipy.stats.ks_2samp`'s statistic and the p-value its ``method='asymp'``
    gives (the one-sample Kolmogorov distribution at n = n_a n_b / (n_a + n_b))."""
    from scipy.stats import kstwo
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    wa = np.ones(a.size) if wa is None else np.asarray(wa, float)
    wb = np.ones(b.size) if wb is None else np.asarray(wb, float)
    ia, ib = np.argsort(a), np.argsort(b)
    a, wa, b, wb = a[ia], wa[ia], b[ib], wb[ib]
    ca = np.concatenate([[0.0], np.cumsum(wa)]) / wa.sum()
    cb = np.concatenate([[0.0], np.cumsum(wb)]) / wb.sum()
    x = np.concatenate([a, b])
    fa = ca[np.searchsorted(a, x, side="right")]
    fb = cb[np.searchsorted(b, x, side="right")]
    d = float(np.max(np.abs(fa - fb)))
    na = wa.sum() ** 2 / (wa ** 2).sum()
    nb = wb.sum() ** 2 / (wb ** 2).sum()
    ne = na * nb / (na + nb)
    p = float(kstwo.sf(d, max(1, int(round(ne))))) if ne > 0 else float("nan")
    return d, p


def distance(a, b, wa=None, wb=None) -> dict:
    """KS statistic and p-value, Wasserstein-1 distance, sizes and (weighted) means of two
    samples with optional sample weights (chords carry edge-correction weights)."""
    from scipy.stats import wasserstein_distance
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    wa = np.ones(a.size) if wa is None else np.asarray(wa, float)
    wb = np.ones(b.size) if wb is None else np.asarray(wb, float)
    ka = np.isfinite(a) & np.isfinite(wa) & (wa > 0)
    kb = np.isfinite(b) & np.isfinite(wb) & (wb > 0)
    a, wa, b, wb = a[ka], wa[ka], b[kb], wb[kb]
    out = {"n_virtual": int(a.size), "n_observed": int(b.size),
           "mean_virtual_nm": float(np.average(a, weights=wa)) if a.size else None,
           "mean_observed_nm": float(np.average(b, weights=wb)) if b.size else None,
           "ks_statistic": None, "ks_pvalue": None, "wasserstein_nm": None}
    if a.size and b.size:
        out["ks_statistic"], out["ks_pvalue"] = weighted_ks(a, b, wa, wb)
        out["wasserstein_nm"] = float(wasserstein_distance(a, b, wa, wb))
    return out


@dataclass
class VirtualImage:
    """One binary virtual micrograph: ``mask`` (solid), ``valid`` (inside the sample),
    what it is (``label``) and what it was made from, for a figure: the section's phase
    labels (``kind`` "section") or the projection's transmitted intensity ("projection")."""

    mask: np.ndarray
    valid: np.ndarray
    pixel: float
    label: str
    image: np.ndarray
    kind: str = "section"


def virtual_images(obj, kind: str = "section", *, axis: str = "z", count: int = 5,
                   pixel: float, slab: float | None = None, grid=None,
                   mfp: float = 100.0, resolution: float = 0.0, threshold=None,
                   solid_phases=("solid", "interlayer"), margin: float = 0.1) -> list[VirtualImage]:
    """``count`` virtual micrographs of ``obj`` at ``pixel`` nm: sections across ``axis``
    at evenly spaced offsets (the middle ``1 - 2 margin`` of the domain), or projections of
    ``count`` slabs of thickness ``slab`` spread the same way."""
    kind = str(kind).lower()
    if kind not in ("section", "projection"):
        raise OptionError(f"--virtual must be section or projection, got {kind!r}", param="virtual")
    a = AXES.get(str(axis).lower())
    if a is None:
        raise OptionError(f"--axis must be x, y or z, got {axis!r}", param="axis")
    count = int(count)
    if not 1 <= count <= 200:
        raise OptionError(f"--count must be 1 to 200, got {count}", param="count")
    if not (0 <= margin < 0.5):
        raise OptionError(f"margin must be in [0, 0.5), got {margin}")
    centre, span = centre_and_span(obj)
    L = float(span[a])
    if count == 1:
        offs = np.array([0.0])
    else:
        offs = np.linspace(-(0.5 - margin) * L, (0.5 - margin) * L, count)
    out = []
    if kind == "section":
        g = grid
        n = np.zeros(3)
        n[a] = 1.0
        codes = solid_phases
        for off in offs:
            img = section(obj, n, float(off), pixel=pixel, grid=g)
            out.append(VirtualImage(img.mask(codes) & img.valid, img.valid, img.pixel,
                                    f"section {'xyz'[a]} = {centre[a] + off:.3g} nm",
                                    img.labels, "section"))
    else:
        if slab is None:
            slab = L / count
        for off in offs:
            p = projection(obj, "xyz"[a], slab, offset=float(off), pixel=pixel, mfp=mfp,
                           resolution=resolution, grid=grid)
            label = f"projection {'xyz'[a]} {p.slab[0]:.3g}..{p.slab[1]:.3g} nm"
            try:
                m, _ = segment_projection(p, threshold)
            except OptionError as e:
                raise OptionError(f"{label}: {e.detail}; use a thicker --slab or fewer "
                                  "--count", param="slab") from None
            out.append(VirtualImage(m, p.valid, p.pixel, label, p.intensity, "projection"))
    return out


@dataclass
class Comparison:
    """Pooled virtual descriptors against the observed ones."""

    distances: dict
    scalars: dict
    n_virtual: int
    kind: str
    notes: list = field(default_factory=list)
    pooled: dict = field(default_factory=dict, repr=False)
    observed: dict = field(default_factory=dict, repr=False)
    pooled_weights: dict = field(default_factory=dict, repr=False)
    observed_weights: dict = field(default_factory=dict, repr=False)

    def ecdf(self, name: str, which: str = "virtual"):
        """Weighted empirical CDF (x sorted, F) of a distribution, virtual or observed."""
        x = (self.pooled if which == "virtual" else self.observed).get(name)
        w = (self.pooled_weights if which == "virtual" else self.observed_weights).get(name)
        if x is None or len(x) == 0:
            return np.zeros(0), np.zeros(0)
        x = np.asarray(x, float)
        w = np.ones(x.size) if w is None else np.asarray(w, float)
        o = np.argsort(x)
        return x[o], np.cumsum(w[o]) / w.sum()

    def to_dict(self) -> dict:
        return {"kind": self.kind, "n_virtual_images": self.n_virtual,
                "distances": self.distances, "scalars": self.scalars, "notes": list(self.notes)}

    def table(self) -> dict:
        names = list(self.distances)
        cols = {"distribution": np.array(names, dtype=object)}
        for k in ("n_virtual", "n_observed", "mean_virtual_nm", "mean_observed_nm", "ks_statistic",
                  "ks_pvalue", "wasserstein_nm"):
            cols[k] = np.array([np.nan if self.distances[n][k] is None else self.distances[n][k]
                                for n in names], float)
        return cols


SCALARS = ("area_fraction", "mean_chord_solid_nm", "mean_chord_pore_nm", "mean_thickness_solid_nm",
           "mean_thickness_pore_nm", "orientation_order", "coherence")


def compare(virtual_descriptors, observed_descriptors, kind: str = "section") -> Comparison:
    """Pool the distributions of several virtual images and compare them with the
    observed image's (KS and Wasserstein per distribution), and set the scalar
    descriptors side by side (virtual: mean and standard deviation over the images)."""
    vds = list(virtual_descriptors)
    if not vds:
        raise OptionError("no virtual image to compare")
    obs, obs_w = observed_descriptors.distributions(), observed_descriptors.weights()
    each = [(d.distributions(), d.weights(), d.headline()) for d in vds]  # once per image
    pooled = {n: np.concatenate([np.asarray(dd[n], float) for dd, _, _ in each])
              for n in DISTRIBUTIONS}
    pooled_w = {n: np.concatenate([np.asarray(ww[n], float) for _, ww, _ in each])
                for n in DISTRIBUTIONS}
    dist = {n: distance(pooled[n], obs[n], pooled_w[n], obs_w[n]) for n in DISTRIBUTIONS}
    od = observed_descriptors.headline()
    scal = {}
    for k in SCALARS:
        vals = np.array([v for _, _, h in each if isinstance(v := h.get(k), (int, float))
                         and math.isfinite(v)], float)
        o = od.get(k)
        scal[k] = {"virtual_mean": float(vals.mean()) if vals.size else None,
                   "virtual_sd": float(vals.std(ddof=1)) if vals.size > 1 else None,
                   "observed": o if isinstance(o, (int, float)) else None}
    notes = ["KS p-values assume independent samples; chords of neighbouring rows and "
             "per-pixel thickness values are correlated, so read D and W1 as distances"]
    return Comparison(dist, scal, len(vds), kind, notes, pooled, obs, pooled_w, obs_w)

