"""Unit tests of sheetview.measures.correlation (S2 by FFT against direct pair counts)."""
import numpy as np
import pytest

from sheetview.errors import MemoryLimitError, OptionError
from sheetview.grid import GEL, OUTSIDE, SOLID, PhaseGrid
from sheetview.measures.correlation import s2_map, two_point_correlation


def _direct(m, w, d, periodic):
    """S2 at lattice displacement d by direct pair counting (independent numpy path)."""
    if periodic:
        sh = np.roll(m, tuple(-c for c in d), axis=(0, 1, 2))
        return (m & sh).mean()
    sa, sb = [], []
    for c, n in zip(d, m.shape):
        sa.append(slice(max(0, -c), n - max(0, c)))
        sb.append(slice(max(0, c), n - max(0, -c)))
    sa, sb = tuple(sa), tuple(sb)
    both = (m[sa] & w[sa] & m[sb] & w[sb]).sum()
    pairs = (w[sa] & w[sb]).sum()
    return both / pairs


@pytest.mark.parametrize("periodic", [True, False])
def test_s2_map_matches_direct_counts(periodic):
    rng = np.random.default_rng(0)
    m = rng.random((6, 7, 8)) < 0.4
    w = np.ones_like(m) if periodic else rng.random(m.shape) < 0.8
    s2, pairs = s2_map(m, None if periodic else w, periodic)
    for d in [(0, 0, 0), (1, 0, 0), (0, -2, 1), (3, 3, -3), (-1, 2, 0)]:
        assert s2[d] == pytest.approx(_direct(m, w, d, periodic), abs=1e-12)


def test_radial_average_and_outside_excluded():
    rng = np.random.default_rng(1)
    lab = rng.choice([SOLID, GEL], size=(16, 16, 16)).astype(np.uint8)
    lab[:3] = OUTSIDE
    g = PhaseGrid(lab, spacing=0.3)
    r = two_point_correlation(g, GEL)
    inside = lab != OUTSIDE
    assert r.s2[0] == pytest.approx((lab[inside] == GEL).mean())
    assert r.r[0] == 0 and np.all(np.diff(r.r) > 0)
    assert r.r[-1] <= 0.5 * 16 * 0.3 + 0.3
    # uncorrelated voxels: S2(r > 0) = phi^2 up to noise
    assert np.allclose(r.s2[1:], r.phi ** 2, atol=0.02)
    d = r.to_dict()
    assert len(d["r_nm"]) == len(d["s2"]) and set(r.table()) == {"r_nm", "s2", "pairs"}


def test_errors():
    g = PhaseGrid(np.full((4, 4, 4), GEL, np.uint8))
    with pytest.raises(MemoryLimitError, match="GB"):
        two_point_correlation(g, GEL, max_bytes=10)
    with pytest.raises(OptionError, match="positive"):
        two_point_correlation(g, GEL, bin_width=-1)
    with pytest.raises(OptionError, match="inside the domain"):
        two_point_correlation(PhaseGrid(np.zeros((4, 4, 4), np.uint8)), GEL)
    with pytest.raises(OptionError, match="PhaseGrid"):
        two_point_correlation(np.zeros((4, 4, 4)), GEL)
