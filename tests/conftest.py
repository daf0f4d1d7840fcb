"""Shared fixtures: the learning-core tests' topologies (topology, engine, loops, config,
validate) and `base`, the short temp dir of the tests that run a real service."""
from __future__ import annotations

import shutil
import tempfile
from collections.abc import Callable, Iterator

import numpy as np
import pytest

from routerd.core import topology as T


def ring_with_chords(n: int, chords: int, seed: int = 0, *, zero_delay: bool = False) -> T.Topology:
    """A connected graph of our own: a ring plus `chords` random chords, seeded delays."""
    rng = np.random.default_rng(seed)
    names = [f"h{i}" for i in range(n)]
    pairs = {tuple(sorted((i, (i + 1) % n))) for i in range(n)}
    while len(pairs) < min(n + chords, n * (n - 1) // 2):
        a, b = (int(v) for v in rng.integers(0, n, 2))
        if a != b:
            pairs.add((min(a, b), max(a, b)))
    specs = []
    for a, b in sorted(pairs):
        delay = 0.0 if zero_delay and rng.random() < 0.5 else float(rng.uniform(1e-4, 5e-3))
        specs.append(T.LinkSpec(names[a], names[b], delay, 1e9, 100, f"ring[{a}-{b}]"))
        specs.append(T.LinkSpec(names[b], names[a], delay, 1e9, 100, f"ring[{b}-{a}]"))
    return T.build(f"ring-{n}", names, specs)


@pytest.fixture
def base() -> Iterator[str]:
    """A fresh directory under /tmp, removed afterwards, for the tests that start a real
    service: ipc:// paths are limited to about 100 bytes (sun_path), so it is kept short
    rather than pytest's long tmp_path (test_shard.py has its own, with a config in it)."""
    d = tempfile.mkdtemp(prefix="rd-", dir="/tmp")
    try:
        yield d
    finally:
        shutil.rmtree(d, ignore_errors=True)


@pytest.fixture(scope="session")
def make_ring() -> Callable[..., T.Topology]:
    return ring_with_chords


@pytest.fixture(scope="session")
def small_ring() -> T.Topology:
    """8 nodes, 6 chords: small enough that random rows collide often (chains, repeats)."""
    return ring_with_chords(8, 6, seed=7)


def topohub_json(key: str) -> dict:
    """The dataset's own file, read directly (the reference side of topohub checks)."""
    import importlib.resources
    import json

    import topohub

    with (importlib.resources.files(topohub) / "data" / f"{key}.json").open("rb") as fh:
        return json.load(fh)


@pytest.fixture(scope="session")
def topohub_raw() -> Callable[[str], dict]:
    return topohub_json


@pytest.fixture(scope="session", params=["reference", "compiled"])
def kernel_path(request: pytest.FixtureRequest) -> str:
    """``engine.kernels`` for tests that must hold on both paths (routerd/core/kernels.py).
    The compiled one is skipped, with the reason, where the extension is not built."""
    from routerd.core import kernels

    if request.param == "compiled" and not kernels.available():
        pytest.skip(kernels.status("compiled")["reason"])
    return str(request.param)
