"""The plots module: a deterministic layout and PNGs that decode and show something."""
from __future__ import annotations

import numpy as np

from routerd import topology
from sim import plots
from sim.run import DEMO_TOPOLOGY, run


def test_layout_is_deterministic_and_spread() -> None:
    t = topology.load(DEMO_TOPOLOGY)
    a, b = plots.layout(t), plots.layout(t)
    assert np.array_equal(a, b)
    d = np.linalg.norm(a[:, None] - a[None], axis=2) + np.eye(t.n)
    assert d.min() > 0.05  # no two nodes on top of each other
    # neighbours sit closer than the average pair (a force layout's point)
    nb = np.mean([d[x, y] for x, y in zip(t.src.tolist(), t.dst.tolist())])
    assert nb < d[~np.eye(t.n, dtype=bool)].mean()


def test_draw_all(tmp_path) -> None:
    import matplotlib.image as mpimg

    t = topology.load(DEMO_TOPOLOGY)
    r = run({"policy": "shortest", "rate_pps": 1500.0, "duration_s": 4.0, "seed": 1})
    paths = plots.draw_all(r, t, str(tmp_path))
    for p in paths:
        img = mpimg.imread(p)
        assert img[..., :3].std() > 0.05
