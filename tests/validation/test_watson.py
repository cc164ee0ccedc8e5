"""The Watson sampler (sheetview.synth.watson_sample) against its closed forms.

Density on the unit sphere proportional to exp(kappa (mu . x)^2) (Watson, Biometrika 52
(1965) 193; Mardia, K. V. & Jupp, P. E., Directional Statistics, Wiley 2000, section 9.4.2);
the marginal of t = mu . x is proportional to exp(kappa t^2) on [-1, 1]. From that published
density (derived here, not quoted from the book):

    kappa > 0:  <t^2> = e^kappa / (sqrt(pi kappa) erfi(sqrt kappa)) - 1 / (2 kappa),
    kappa < 0:  <t^2> = 1 / (2 a) - e^-a / (sqrt(pi a) erf(sqrt a)),   a = -kappa,
    S = (3 <t^2> - 1) / 2,

(d/dkappa of log int_0^1 exp(kappa t^2) dt). Both forms are also checked in the test against
a direct numerical integration of the marginal (scipy.integrate.quad), so the reference
does not rest on the algebra alone. erf and erfi are scipy.special's.
"""
import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import erf, erfi

from sheetview.synth import watson_sample


def mean_t2(kappa):
    """Closed form <(mu . x)^2> of the Watson distribution (derived from its density)."""
    if kappa > 0:
        r = math.sqrt(kappa)
        return math.exp(kappa) / (math.sqrt(math.pi) * r * erfi(r)) - 1.0 / (2.0 * kappa)
    if kappa < 0:
        a = -kappa
        r = math.sqrt(a)
        return 1.0 / (2.0 * a) - math.exp(-a) / (math.sqrt(math.pi) * r * erf(r))
    return 1.0 / 3.0


def mean_t2_quad(kappa):
    """The same moment by numerical integration of the marginal density."""
    z = integrate.quad(lambda u: math.exp(kappa * (u * u - 1)), 0.0, 1.0, epsabs=0,
                       epsrel=1e-13)[0]
    m = integrate.quad(lambda u: u * u * math.exp(kappa * (u * u - 1)), 0.0, 1.0, epsabs=0,
                       epsrel=1e-13)[0]
    return m / z


def _random_axis(rng):
    mu = rng.normal(size=3)
    return mu / np.linalg.norm(mu)


@pytest.mark.parametrize("kappa", [-8.0, -1.0, 1.0, 5.0, 20.0])
def test_mean_cos2_and_S_against_closed_form(kappa):
    """Sample mean of t^2 = (mu . x)^2 (random axis mu) within 4 standard errors of the
    closed form (derived from the Watson density, Mardia & Jupp 2000); S = (3 <t^2> - 1)/2
    likewise (its standard error is 3/2 that of <t^2>). The closed form itself agrees with
    the numerical integral of the marginal to 1e-10."""
    assert mean_t2(kappa) == pytest.approx(mean_t2_quad(kappa), abs=1e-10)
    n = 200_000
    rng = np.random.default_rng(int(1000 + 10 * kappa))
    mu = _random_axis(rng) * rng.uniform(0.5, 3.0)  # the axis need not be unit length
    x = watson_sample(n, kappa, mu, seed=rng)
    assert np.allclose(np.linalg.norm(x, axis=1), 1.0)
    c2 = (x @ (mu / np.linalg.norm(mu))) ** 2
    se = c2.std(ddof=1) / math.sqrt(n)
    exact = mean_t2(kappa)
    assert abs(c2.mean() - exact) < 4 * se
    S_hat, S_exact = (3 * c2.mean() - 1) / 2, (3 * exact - 1) / 2
    assert abs(S_hat - S_exact) < 4 * 1.5 * se


def _marginal_cdf_table(kappa, grid):
    """Exact CDF of s = |mu . x| on [0, 1]: int_0^s exp(kappa u^2) du / int_0^1 ...,
    by numerical integration (scipy.integrate.quad) on a grid, interval by interval."""
    f = lambda u: math.exp(kappa * (u * u - 1))  # noqa: E731
    parts = [integrate.quad(f, a, b)[0] for a, b in zip(grid[:-1], grid[1:])]
    cum = np.concatenate([[0.0], np.cumsum(parts)])
    return cum / cum[-1]


@pytest.mark.parametrize("kappa", [-8.0, -1.0, 0.0, 1.0, 5.0, 20.0])
def test_marginal_of_t_kolmogorov_smirnov(kappa):
    """Kolmogorov-Smirnov test of |t| = |mu . x| (random axis) against the exact marginal
    CDF (density proportional to exp(kappa t^2); Watson 1965; Mardia & Jupp 2000), p > 0.001.
    Covers the girdle (kappa < 0) and uniform (kappa = 0) cases too. The same sample with
    the CDF of kappa + 1 (or kappa - 1) is rejected (p < 0.001): the test can fail."""
    rng = np.random.default_rng(2024 + int(kappa))
    mu = _random_axis(rng)
    x = watson_sample(3000, kappa, mu, seed=rng)
    s = np.abs(x @ mu)
    grid = np.linspace(0, 1, 2001)
    table = _marginal_cdf_table(kappa, grid)
    assert stats.kstest(s, lambda v: np.interp(v, grid, table)).pvalue > 0.001
    other = _marginal_cdf_table(kappa + (2.0 if kappa < 10 else -5.0), grid)
    assert stats.kstest(s, lambda v: np.interp(v, grid, other)).pvalue < 0.001


def test_azimuth_uniform_about_the_axis():
    """The azimuth about mu is uniform (rotational symmetry of the Watson density;
    Mardia & Jupp 2000): KS test of phi / 2 pi against U(0, 1), p > 0.001, about a random
    axis (azimuth measured in a frame built from mu)."""
    rng = np.random.default_rng(7)
    mu = _random_axis(rng)
    x = watson_sample(4000, 3.0, mu, seed=rng)
    e1 = np.cross(mu, [1.0, 0.0, 0.0] if abs(mu[0]) < 0.9 else [0.0, 1.0, 0.0])
    e1 /= np.linalg.norm(e1)
    e2 = np.cross(mu, e1)
    phi = np.mod(np.arctan2(x @ e2, x @ e1), 2 * math.pi) / (2 * math.pi)
    assert stats.kstest(phi, "uniform").pvalue > 0.001


@pytest.mark.parametrize("kappa", [200.0, -200.0])
def test_strong_axis_and_girdle(kappa):
    """Large positive kappa concentrates x along +-mu, large negative kappa on the great
    circle normal to mu: <t^2> within 4 standard errors of the exact closed form (about
    1 - 1/kappa and 1/(2|kappa|); derived from the density)."""
    rng = np.random.default_rng(1)
    mu = _random_axis(rng)
    t2 = (watson_sample(50_000, kappa, mu, seed=rng) @ mu) ** 2
    se = t2.std(ddof=1) / math.sqrt(t2.size)
    assert abs(t2.mean() - mean_t2(kappa)) < 4 * se
    assert mean_t2(kappa) == pytest.approx(1 - 1 / kappa if kappa > 0 else 1 / (2 * abs(kappa)),
                                           abs=1e-4)
