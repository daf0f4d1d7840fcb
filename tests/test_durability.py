"""Durability of a state directory under real processes: one writer per directory (the
lock), recovery from damage, and the crash-and-corrupt loop.

Runs real ``routerd serve`` processes on ipc:// endpoints under a short /tmp dir
(tests/service_harness.py).
"""
from __future__ import annotations

import os
import subprocess
import sys

import msgpack
import numpy as np
import pytest
import zmq
from service_harness import ServiceProc, service_args

from routerd import config, journal, wire
from routerd.service import load_topology

DEMO = load_topology(config.load(None))


def journal_bytes(state_dir: str) -> dict[str, bytes]:
    """Every file under journal/ and snapshots/, name -> content."""
    out: dict[str, bytes] = {}
    for sub in ("journal", "snapshots"):
        d = os.path.join(state_dir, sub)
        for name in sorted(os.listdir(d)) if os.path.isdir(d) else []:
            with open(os.path.join(d, name), "rb") as fh:
                out[f"{sub}/{name}"] = fh.read()
    return out


def settled_bytes(state_dir: str) -> dict[str, bytes]:
    """The files once the service has journaled its debounced decision (nothing changes
    for 0.5 s)."""
    import time

    prev = journal_bytes(state_dir)
    for _ in range(40):
        time.sleep(0.5)
        cur = journal_bytes(state_dir)
        if cur == prev:
            return cur
        prev = cur
    raise AssertionError("the state dir never settled")


def run_cli(*argv: str, timeout: float = 60) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "routerd", *argv], capture_output=True,
                          text=True, timeout=timeout)


def send_some(sp: ServiceProc, reporter: str, first: int, n: int, rng: np.random.Generator) -> None:
    d = sp.socket(zmq.DEALER, "ingest")
    try:
        for b in range(first, first + n):
            link = rng.integers(0, DEMO.n_links, 20)
            dd = rng.integers(0, DEMO.n - 1, 20)
            dd = np.where(dd >= DEMO.src[link], dd + 1, dd)
            d.send_multipart([b"", wire.encode_ingest_cols(reporter, b, DEMO.digest, DEMO.src[link],
                                                           DEMO.dst[link], dd, DEMO.delay_s[link] * 2)])
            rep = msgpack.unpackb(d.recv_multipart()[-1], raw=False)
            assert rep.get("accepted") == 20, rep
    finally:
        d.close(0)


# ---- item 2: one writer per state directory ----------------------------------------------
@pytest.mark.slow
def test_second_serve_on_a_live_state_dir_exits_2_and_writes_nothing(base: str) -> None:
    sp = ServiceProc(base, service_args(base))
    try:
        send_some(sp, "first", 0, 5, np.random.default_rng(1))
        before = settled_bytes(sp.state_dir)
        assert any(k.startswith("journal/") for k in before)
        # the very same command line (ipc endpoints too), and one with endpoints of its own
        other = os.path.join(base, "x")
        os.mkdir(other)
        for args in (service_args(base),
                     [*service_args(other)[:-2], "--state-dir", sp.state_dir]):
            r = run_cli("serve", *args)
            assert r.returncode == 2, r.stdout + r.stderr
            assert f"pid {sp.proc.pid}" in r.stderr and os.path.abspath(sp.state_dir) in r.stderr, r.stderr
            assert "ready" not in r.stdout
            assert journal_bytes(sp.state_dir) == before       # byte for byte
        # the first one still owns its sockets and keeps acknowledging
        send_some(sp, "first", 5, 3, np.random.default_rng(2))
        # replay reading the live dir is fine; replay writing into it is not
        out_inside = os.path.join(sp.state_dir, "replay-out")
        r = run_cli("replay", sp.state_dir, "--out", out_inside, "--no-plot", "--quiet")
        assert r.returncode == 2, r.stdout + r.stderr
        assert f"pid {sp.proc.pid}" in r.stderr and not os.path.exists(out_inside)
        r = run_cli("replay", sp.state_dir, "--out", os.path.join(base, "ro"), "--no-plot", "--quiet")
        assert r.returncode == 0, r.stdout + r.stderr
    finally:
        sp.kill()
    # the holder is gone (kill -9): its lock died with it
    sp = ServiceProc(base, service_args(base))
    sp.kill()
    assert journal.iter_records(journal.journal_dir(sp.state_dir)) is not None
