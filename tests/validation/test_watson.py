"""The Watson sampler (sheetview.synth.watson_sample) against its closed forms.

Density on the unit sphere proportional to exp(kappa (mu . x)^2); the marginal of
t = mu . x is proportional to exp(kappa t^2) on [-1, 1], and

    <cos^2 theta> = e^kappa / (sqrt(pi kappa) erfi(sqrt kappa)) - 1 / (2 kappa),
    S = (3 <cos^2 theta> - 1) / 2.

Source: Mardia, K. V. & Jupp, P. E., Directional Statistics, Wiley (2000), section 9.4.2
(Watson distribution); the formula is published, the tabulated S values are derived
from it (listed in /work/shared/REFERENCES.md). erfi is scipy.special.erfi.
"""
import math

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import erfi

from sheetview.synth import watson_sample


def mean_cos2(kappa):
    """Closed form <cos^2 theta> of the Watson distribution (Mardia & Jupp 2000)."""
    r = math.sqrt(kappa)
    return math.exp(kappa) / (math.sqrt(math.pi) * r * erfi(r)) - 1.0 / (2.0 * kappa)


@pytest.mark.parametrize("kappa,S_tab", [(1.0, 0.1438), (5.0, 0.6464), (20.0, 0.9228)])
def test_tabulated_order_parameter(kappa, S_tab):
    """S = 0.1438, 0.6464, 0.9228 at kappa = 1, 5, 20 (derived from the Mardia & Jupp
    closed form; tolerance: the 4-decimal rounding of the table)."""
    assert (3 * mean_cos2(kappa) - 1) / 2 == pytest.approx(S_tab, abs=6e-5)


@pytest.mark.parametrize("kappa", [1.0, 5.0, 20.0])
def test_mean_cos2_and_S_against_closed_form(kappa):
    """Sample mean of cos^2 theta within 4 standard errors of the closed form
    (Mardia & Jupp 2000); S likewise (its standard error is 3/2 that of <cos^2>)."""
    n = 200_000
    mu = np.array([0.3, -0.5, 0.8])
    x = watson_sample(n, kappa, mu, seed=12345)
    assert np.allclose(np.linalg.norm(x, axis=1), 1.0)
    c2 = (x @ (mu / np.linalg.norm(mu))) ** 2
    se = c2.std(ddof=1) / math.sqrt(n)
    exact = mean_cos2(kappa)
    assert abs(c2.mean() - exact) < 4 * se
    S_hat, S_exact = (3 * c2.mean() - 1) / 2, (3 * exact - 1) / 2
    assert abs(S_hat - S_exact) < 4 * 1.5 * se


def _marginal_cdf(kappa):
    """Exact CDF of s = |mu . x| on [0, 1]: int_0^s exp(kappa u^2) du / int_0^1 ...,
    by numerical integration (scipy.integrate.quad)."""
    z = integrate.quad(lambda u: math.exp(kappa * u * u), 0.0, 1.0)[0]

    def cdf(s):
        s = np.atleast_1d(s)
        return np.array([integrate.quad(lambda u: math.exp(kappa * u * u), 0.0, float(v))[0] / z
                         for v in s])
    return cdf


@pytest.mark.parametrize("kappa", [-8.0, -1.0, 0.0, 1.0, 5.0, 20.0])
def test_marginal_of_t_kolmogorov_smirnov(kappa):
    """Kolmogorov-Smirnov test of |t| = |mu . x| against the exact marginal CDF
    (density proportional to exp(kappa t^2); Mardia & Jupp 2000) with a fixed seed:
    p > 0.001. Covers the girdle (kappa < 0) and uniform (kappa = 0) cases too."""
    mu = np.array([0.0, 1.0, 0.0])
    x = watson_sample(3000, kappa, mu, seed=2024)
    s = np.abs(x @ mu)
    cdf = _marginal_cdf(kappa)
    # tabulate the exact CDF once on a fine grid and interpolate (monotone, smooth)
    grid = np.linspace(0, 1, 2001)
    table = cdf(grid)
    res = stats.kstest(s, lambda v: np.interp(v, grid, table))
    assert res.pvalue > 0.001


def test_azimuth_uniform_about_the_axis():
    """The azimuth about mu is uniform (rotational symmetry of the Watson density;
    Mardia & Jupp 2000): KS test of phi / 2 pi against U(0, 1), p > 0.001."""
    x = watson_sample(4000, 3.0, (0, 0, 1), seed=7)
    phi = np.mod(np.arctan2(x[:, 1], x[:, 0]), 2 * math.pi) / (2 * math.pi)
    assert stats.kstest(phi, "uniform").pvalue > 0.001


def test_kappa_sign_distinguishes_axis_and_girdle():
    """Large positive kappa concentrates x along +-mu, large negative kappa on the
    great circle normal to mu: <cos^2> -> 1 - 1/kappa and -> 1/(2|kappa|) (asymptotics of
    the closed form; derived)."""
    mu = np.array([1.0, 0.0, 0.0])
    a = watson_sample(50_000, 200.0, mu, seed=1) @ mu
    b = watson_sample(50_000, -200.0, mu, seed=1) @ mu
    assert (a ** 2).mean() == pytest.approx(1 - 1 / 200, abs=5e-4)
    assert (b ** 2).mean() == pytest.approx(1 / 400, abs=5e-4)
