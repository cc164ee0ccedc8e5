"""Orientation order against closed forms of directional statistics."""
import math

import numpy as np
import pytest
from scipy import stats
from scipy.special import erfi

from sheetview import Sphere, Structure
from sheetview.measures.orientation import (orientation, orientation_histogram, q_summary,
                                            q_tensor)


def watson_cos2(kappa):
    """<cos^2 theta> of the Watson distribution, density prop. to exp(kappa (mu.x)^2):
    e^kappa / (sqrt(pi kappa) erfi(sqrt kappa)) - 1/(2 kappa).
    Mardia & Jupp, Directional Statistics (2000), section 9.4 (formula published)."""
    return math.exp(kappa) / (math.sqrt(math.pi * kappa) * erfi(math.sqrt(kappa))) - 0.5 / kappa


def sample_watson(kappa, n, mu, rng):
    """Watson sample by rejection on u = mu.x (density prop. to exp(kappa u^2) on
    [-1, 1], uniform proposal, acceptance exp(kappa (u^2 - 1))) and uniform azimuth."""
    out = []
    while sum(len(o) for o in out) < n:
        u = rng.uniform(-1, 1, 4 * n)
        out.append(u[rng.random(4 * n) < np.exp(kappa * (u * u - 1))])
    u = np.concatenate(out)[:n]
    phi = rng.uniform(0, 2 * np.pi, n)
    s = np.sqrt(1 - u * u)
    local = np.stack([s * np.cos(phi), s * np.sin(phi), u], 1)
    mu = np.asarray(mu, float) / np.linalg.norm(mu)
    e = np.array([1.0, 0, 0]) if abs(mu[0]) < 0.9 else np.array([0, 1.0, 0])
    a = np.cross(mu, e)
    a /= np.linalg.norm(a)
    b = np.cross(mu, a)
    return local[:, :1] * a + local[:, 1:2] * b + local[:, 2:] * mu


@pytest.mark.parametrize("kappa,S_table", [(1.0, 0.1438), (5.0, 0.6464), (20.0, 0.9228)])
def test_watson_closed_form_values(kappa, S_table):
    """The closed form reproduces S = 0.1438, 0.6464, 0.9228 at kappa = 1, 5, 20 (values
    derived from Mardia & Jupp 2000, listed in REFERENCES.md), to 1e-4."""
    assert (3 * watson_cos2(kappa) - 1) / 2 == pytest.approx(S_table, abs=1e-4)


@pytest.mark.parametrize("kappa", [1.0, 5.0, 20.0])
def test_watson_order_parameter(kappa):
    """S of Watson-distributed prism normals (through the whole measure, volume weights
    equal) matches (3 <cos^2> - 1)/2 within 4 standard errors of the sample mean of P2
    (Mardia & Jupp, Directional Statistics, 2000)."""
    rng = np.random.default_rng(int(kappa * 10))
    n = 20000
    mu = [0.3, -0.5, 0.8]
    nrm = sample_watson(kappa, n, mu, rng)
    # three corners in the plane normal to nrm: project random offsets onto the plane
    off = rng.normal(size=(n, 3, 3))
    off -= np.einsum("nkj,nj->nk", off, nrm)[:, :, None] * nrm[:, None, :]
    cen = rng.uniform(-20, 20, (n, 3))
    s = Structure(off * 0.3 + cen[:, None, :], 0.5, Sphere((0, 0, 0), 50))
    # measured normals are the triangles' own: use them for the sample P2
    c = np.abs(s.normals @ (np.asarray(mu) / np.linalg.norm(mu)))
    w = s.volumes / s.volumes.sum()
    p2 = 1.5 * c * c - 0.5
    se = math.sqrt(np.sum(w * w * (p2 - np.sum(w * p2)) ** 2))
    r = orientation(s, local_radius=1.0)
    expected = (3 * watson_cos2(kappa) - 1) / 2
    assert abs(r.S - expected) < 4 * se
    assert abs(abs(r.director @ mu) / np.linalg.norm(mu) - 1) < 0.01


def test_isotropic_trace_identity():
    """For N isotropic unit vectors, E[(2/3) tr Q^2] = 1/N exactly (derived: tr Q^2 =
    (9/4)(1/N^2) sum (u_i.u_j)^2 - 3/4 with E[(u_i.u_j)^2] = 1/3 for i != j); the
    largest eigenvalue is about 0.8/sqrt(N) (by simulation, REFERENCES.md; Eppenga &
    Frenkel, Mol. Phys. 52 (1984) 1303, from memory). Tolerances: 5 standard errors for
    the identity, 15 % for the eigenvalue scaling."""
    rng = np.random.default_rng(11)
    N, M = 50, 4000
    u = rng.normal(size=(M, N, 3))
    u /= np.linalg.norm(u, axis=2, keepdims=True)
    Q = 1.5 * np.einsum("mni,mnj->mij", u, u) / N - 0.5 * np.eye(3)
    t = (2 / 3) * np.einsum("mij,mij->m", Q, Q)
    assert abs(t.mean() - 1 / N) < 5 * t.std() / math.sqrt(M)
    # our q_tensor agrees with the einsum on a few sets
    for m in range(3):
        np.testing.assert_allclose(q_tensor(u[m]), Q[m], atol=1e-12)
    S = np.array([q_summary(Q[m])[0] for m in range(M)])
    assert S.mean() * math.sqrt(N) == pytest.approx(0.8, rel=0.15)


def test_equal_area_bins_isotropic():
    """Bins equal in cos(theta) and phi cover equal solid angles (Archimedes' hat-box
    theorem, common practice), so isotropic normals fill them evenly: chi-square test at
    p > 1e-3."""
    rng = np.random.default_rng(12)
    u = rng.normal(size=(60000, 3))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    frac, _, _ = orientation_histogram(u, np.ones(len(u)), axis=[0.2, 0.3, 0.9], n_cos=8, n_phi=10)
    counts = frac.ravel() * len(u)
    assert stats.chisquare(counts).pvalue > 1e-3
