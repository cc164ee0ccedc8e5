import os

import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "Agg")

SAMPLE_CSV = """# sheetview prisms v1
# units: "nm"
# thickness: 0.7
# spacing: 1.4
# domain: {"shape": "box", "min": [0, 0, 0], "max": [30, 30, 30]}
ax,ay,az,bx,by,bz,cx,cy,cz
0,0,0,2,0,0,1,1.732051,0
"""


@pytest.fixture
def sample_csv(tmp_path):
    p = tmp_path / "sample.csv"
    p.write_text(SAMPLE_CSV)
    return p


def random_structure(n=20, seed=0, domain=None, columns=True):
    """Random non-degenerate prisms in a 30 nm box (test helper)."""
    from sheetview import Box, Structure

    rng = np.random.default_rng(seed)
    c = rng.uniform(3, 27, (n, 1, 3))
    v = c + rng.normal(0, 1.0, (n, 3, 3))
    cols = {}
    if columns:
        cols = {"sheet": rng.integers(0, 5, n), "born": rng.uniform(0, 10, n),
                "tag": rng.integers(-3, 3, n)}
    return Structure(v, rng.uniform(0.3, 0.9, n), domain or Box((0, 0, 0), (30, 30, 30)),
                     1.4, cols, {"study": "invented", "rate": 0.5})
