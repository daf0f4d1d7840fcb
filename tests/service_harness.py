"""Start a real ``routerd serve`` process on ipc:// endpoints in a tmp dir, talk to it, stop it.

Support for tests/test_service*.py and tests/test_metrics.py (not a test module itself).
Every process started here is killed by :meth:`ServiceProc.kill` / the context manager,
whatever happens in the test.
"""
from __future__ import annotations

import os
import random
import re
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any

import msgpack
import numpy as np
import zmq

from routerd.io import config, wire
from routerd.io.childproc import parse_ready
from routerd.io.inputs import load_topology

EP = re.compile(r"^  (ingest|pull|publish|control|metrics)\s+(\S+)")
START_TIMEOUT_S = 30.0
DEMO = load_topology(config.load(None))   # the built-in demo lab a plain `routerd serve` serves


class ServiceProc:
    """One service process and the endpoints it printed at start-up."""

    def __init__(self, base: str, args: Sequence[str], env: dict[str, str] | None = None,
                 preexec_fn: Any = None):
        self.base = base
        self.state_dir = os.path.join(base, "state")
        self.args = list(args)
        self.endpoints: dict[str, str] = {}
        self.stdout_lines: list[str] = []
        self.stderr_lines: list[str] = []
        self.epoch: int | None = None
        cmd = [sys.executable, "-m", "routerd", "serve", *self.args]
        self.proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                     text=True, env={**os.environ, **(env or {})},
                                     preexec_fn=preexec_fn)
        self._threads = [threading.Thread(target=self._read_err, daemon=True)]
        self._threads[0].start()
        self._ctx = zmq.Context()
        try:
            self._wait_ready()
        except BaseException:
            self.kill()
            raise

    def _read_err(self) -> None:
        assert self.proc.stderr is not None
        for line in self.proc.stderr:
            self.stderr_lines.append(line.rstrip("\n"))

    def _wait_ready(self) -> None:
        assert self.proc.stdout is not None
        deadline = time.monotonic() + START_TIMEOUT_S
        while time.monotonic() < deadline:
            line = self.proc.stdout.readline()
            if not line:
                self.proc.wait(5)
                raise RuntimeError(f"service exited {self.proc.returncode} before ready:\n"
                                   + "\n".join(self.stdout_lines + self.stderr_lines))
            line = line.rstrip("\n")
            self.stdout_lines.append(line)
            m = EP.match(line)
            if m and m.group(2) != "-":
                self.endpoints[m.group(1)] = m.group(2)
            r = parse_ready(line)
            if r:
                self.epoch = r[1]
                t = threading.Thread(target=self._drain_out, daemon=True)
                t.start()
                self._threads.append(t)
                return
        raise RuntimeError("service not ready in time")

    def _drain_out(self) -> None:
        assert self.proc.stdout is not None
        for line in self.proc.stdout:
            self.stdout_lines.append(line.rstrip("\n"))

    # -- talking to it ------------------------------------------------------------------
    def socket(self, kind: int, name: str, **opts: Any) -> Any:
        s = self._ctx.socket(kind)
        s.linger = 0
        s.rcvtimeo = int(opts.pop("rcvtimeo_ms", 10000))
        s.sndtimeo = 10000
        for k, v in opts.items():
            s.setsockopt(getattr(zmq, k.upper()), v)
        s.connect(self.endpoints[name])
        return s

    def control(self, req: dict[str, Any], timeout_ms: int = 10000) -> dict[str, Any]:
        s = self.socket(zmq.REQ, "control", rcvtimeo_ms=timeout_ms)
        try:
            s.send(msgpack.packb(req, use_bin_type=True))
            return msgpack.unpackb(s.recv(), raw=False, strict_map_key=False)
        finally:
            s.close(0)

    def metrics_text(self) -> str:
        import urllib.request

        with urllib.request.urlopen(self.endpoints["metrics"], timeout=10) as r:
            return r.read().decode()

    # -- stopping it ----------------------------------------------------------------------
    def signal(self, sig: int) -> None:
        self.proc.send_signal(sig)

    def wait(self, timeout: float = 20.0) -> int:
        rc = self.proc.wait(timeout)
        self._close_pipes()
        return rc

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(10)
        self._close_pipes()
        self._ctx.destroy(0)

    def _close_pipes(self) -> None:
        for t in self._threads:
            t.join(5)
        for f in (self.proc.stdout, self.proc.stderr):
            if f is not None and not f.closed:
                f.close()

    def log(self) -> str:
        return "\n".join(self.stdout_lines + self.stderr_lines)


def service_args(base: str, *extra: str, pull: bool = False) -> list[str]:
    """Flags for a service whose endpoints all live under ``base`` (ipc://, port 0 metrics)."""
    a = ["--ingest", f"ipc://{base}/ingest", "--publish", f"ipc://{base}/pub",
         "--control", f"ipc://{base}/ctl", "--metrics", "127.0.0.1:0",
         "--state-dir", os.path.join(base, "state")]
    if pull:
        a += ["--pull", f"ipc://{base}/pull"]
    return a + list(extra)


@contextmanager
def running(base: str, *extra: str, pull: bool = False, config: str | None = None) -> Iterator[ServiceProc]:
    args = service_args(base, *extra, pull=pull)
    if config is not None:
        args += ["--config", config]
    sp = ServiceProc(base, args)
    try:
        yield sp
    finally:
        sp.kill()


def stream_until_killed(sp: ServiceProc, reporter: str, first: int, rng: np.random.Generator,
                        acks_before_kill: int, sent: dict[int, bytes] | None = None,
                        before_kill: Callable[[], None] | None = None) -> dict[int, dict]:
    """Send batches of random demo-lab rows (up to 16 in flight) and SIGKILL the service
    while they are flowing.  Returns the acknowledgements received, by batch number;
    ``sent`` (if given) gets every frame sent, by batch number; ``before_kill`` runs
    just before the kill, with batches still in flight."""
    d = sp.socket(zmq.DEALER, "ingest", rcvtimeo_ms=100, sndhwm=64)
    acked: dict[int, dict] = {}
    n_sent = 0
    inflight = 0
    killed = False
    deadline = time.monotonic() + 60
    try:
        while time.monotonic() < deadline:
            while inflight < 16 and not killed:
                m = int(rng.integers(1, 300))
                link = rng.integers(0, DEMO.n_links, m)
                x, y = DEMO.src[link], DEMO.dst[link]
                dd = rng.integers(0, DEMO.n - 1, m)
                dd = np.where(dd >= x, dd + 1, dd)
                lat = DEMO.delay_s[link] * rng.uniform(1.0, 4.0, m)
                frame = wire.encode_ingest_cols(reporter, first + n_sent, DEMO.digest, x, y, dd, lat)
                d.send_multipart([b"", frame])
                if sent is not None:
                    sent[first + n_sent] = frame
                n_sent += 1
                inflight += 1
            try:
                rep = msgpack.unpackb(d.recv_multipart()[-1], raw=False)
            except zmq.Again:
                if killed:
                    break
                continue
            assert "error" not in rep, rep
            acked[rep["batch"]] = rep
            inflight -= 1
            if not killed and len(acked) >= acks_before_kill:
                if before_kill is not None:
                    before_kill()
                sp.proc.send_signal(signal.SIGKILL)   # mid-stream: 16 batches in flight
                killed = True
                sp.proc.wait(10)
    finally:
        d.close(0)
    assert killed, "the stream never reached the kill point"
    return acked


def short_base(tmp_path: Any) -> str:
    """ipc:// paths must stay under ~100 bytes: a short dir under /tmp, removed by the caller."""
    import tempfile

    return tempfile.mkdtemp(prefix="rd-", dir="/tmp")


def stop_gracefully(sp: ServiceProc, timeout: float = 20.0) -> int:
    sp.signal(signal.SIGTERM)
    return sp.wait(timeout)


def free_udp_ports(k: int) -> list[int]:
    """k distinct UDP ports on 127.0.0.1, each bound until all are chosen (so none repeats),
    drawn below Linux's default ephemeral range (32768-60999, net.ipv4.ip_local_port_range:
    common practice), where no other process's bind to port 0 lands between our choice and
    the agents' own bind."""
    rng = random.Random()
    held: list[socket.socket] = []
    try:
        while len(held) < k:
            s = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
            try:
                s.bind(("127.0.0.1", rng.randrange(20000, 32000)))
            except OSError:
                s.close()
                continue
            held.append(s)
        return [s.getsockname()[1] for s in held]
    finally:
        for s in held:
            s.close()
