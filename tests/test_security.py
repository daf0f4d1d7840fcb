"""routerd.io.security: key pairs, the allow file, CURVE on every endpoint, reporters bound to their nodes."""
from __future__ import annotations

import os
import shutil
import stat
import subprocess
import sys
import textwrap
import time
from collections.abc import Iterator
from typing import Any

import msgpack
import pytest
import zmq
import zmq.auth

from routerd.core import topology as T
from routerd.core.errors import InputError
from routerd.io import inputs, security
from routerd.io import topofiles as TF
from routerd.io.logs import EventLog
from routerd.service import daemon as service
from service_harness import ServiceProc, service_args, short_base

DEMO = os.path.join(os.path.dirname(__file__), "..", "routerd", "data", "demo-lab.yaml")


def _demo() -> T.Topology:
    return TF.load(DEMO)


def _routerd(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "routerd", *args], capture_output=True, check=False,
                          text=True, timeout=60)


# ---- keys ------------------------------------------------------------------------------------
def test_keys_command_writes_a_zeromq_certificate_pair(tmp_path: Any) -> None:
    out = tmp_path / "k"
    r = _routerd("keys", "--out", str(out), "agent-w1")
    assert r.returncode == 0, r.stderr
    pub, sec = out / "agent-w1.key", out / "agent-w1.key_secret"
    # pyzmq's own reader is the reference for the certificate format
    p1, s1 = zmq.auth.load_certificate(str(pub))
    p2, s2 = zmq.auth.load_certificate(str(sec))
    assert s1 is None and p1 == p2 and s2 is not None and len(p1) == 40
    assert stat.S_IMODE(os.stat(sec).st_mode) == 0o600
    assert p1.decode() in r.stdout
    again = _routerd("keys", "--out", str(out), "agent-w1")
    assert again.returncode == 2 and "refusing to overwrite" in again.stderr
    assert _routerd("keys", "--out", str(out), "agent-w1", "--force").returncode == 0
    assert zmq.auth.load_certificate(str(pub))[0] != p1
    bad = _routerd("keys", "--out", str(out), "../evil")
    assert bad.returncode == 2 and "plain file name" in bad.stderr
    assert "NAME.key_secret" in _routerd("keys", "--help").stdout


def test_keys_out_that_cannot_hold_keys_is_named(tmp_path: Any) -> None:
    # --out a file said "cannot write keys: File exists"; a directory where NAME.key goes,
    # with --force, named --out and "Is a directory"
    f = tmp_path / "afile"
    f.write_text("x")
    with pytest.raises(InputError, match="--out: .*afile' is an existing file, not a directory"):
        security.create_keys(str(f), "svc")
    (tmp_path / "k" / "svc.key").mkdir(parents=True)
    with pytest.raises(InputError, match=r"svc\.key is a directory; a key file cannot be written there"):
        security.create_keys(str(tmp_path / "k"), "svc", force=True)


def test_server_key_must_hold_a_secret(tmp_path: Any) -> None:
    pub, sec = security.create_keys(str(tmp_path), "svc")
    assert security.load_server_key(sec)[1]
    with pytest.raises(InputError, match="holds no secret key"):
        security.load_server_key(pub)
    with pytest.raises(InputError, match="no such key file"):
        security.load_server_key(str(tmp_path / "nope.key_secret"))
    (tmp_path / "empty.key_secret").write_text("")
    with pytest.raises(InputError, match="empty"):
        security.load_server_key(str(tmp_path / "empty.key_secret"))
    with pytest.raises(InputError, match="is a directory"):
        security.load_server_key(str(tmp_path))


# ---- allow file ------------------------------------------------------------------------------
def _keys(d: Any, *names: str) -> dict[str, str]:
    out = {}
    for n in names:
        pub, _ = security.create_keys(str(d), n)
        out[n] = security.read_public(pub).decode()
    return out


def test_allow_file_reads_keys_inline_and_from_files(tmp_path: Any) -> None:
    k = _keys(tmp_path / "keys", "w1", "ops")
    f = tmp_path / "allow.yaml"
    f.write_text(textwrap.dedent(f"""\
        w1:
          public_key: "{k['w1']}"
          nodes: [w1, w2]
        ops:
          public_key: keys/ops.key
          nodes: []
          control: true
        """))
    a = security.load_allow(str(f), _demo())
    assert len(a) == 2
    assert a.by_name["w1"].nodes == ("w1", "w2") and not a.by_name["w1"].control
    assert a.by_name["ops"].control and a.by_name["ops"].public_key.decode() == k["ops"]
    assert a.for_user_id(k["w1"]).name == "w1"
    assert a.for_user_id("x" * 40) is None and a.for_user_id(None) is None
    assert a.callback("", k["w1"].encode()) and not a.callback("", b"y" * 40)


def test_allow_file_errors_name_file_line_and_key(tmp_path: Any) -> None:
    k = _keys(tmp_path, "a", "b")
    f = tmp_path / "allow.yaml"
    f.write_text(textwrap.dedent(f"""\
        a:
          public_key: "{k['a']}"
          nodes: [w1, nowhere]
        b:
          public_key: "{k['a']}"
          nodes: w2
        c:
          public_key: "not a key"
          nodes: []
          colour: blue
        d:
          nodes: []
          control: "yes"
        """))
    with pytest.raises(InputError) as ei:
        security.load_allow(str(f), _demo())
    msg = str(ei.value)
    assert f"{f}:3: a.nodes: 'nowhere' is not a node of topology 'demo-lab'" in msg
    assert f"{f}:5: b.public_key" in msg and "also the key of 'a'" in msg
    assert f"{f}:6: b.nodes: 'w2' must be a list of node names" in msg
    assert f"{f}:8: c.public_key: 'not a key' is neither a Z85 key" in msg
    assert f"{f}:10: c.colour" in msg
    assert f"{f}:11: d" in msg and "has no public_key" in msg
    assert f"{f}:13: d.control" in msg


def test_missing_empty_or_twice_listed_allow_files_stop(tmp_path: Any) -> None:
    with pytest.raises(InputError, match="no such allow file"):
        security.load_allow(str(tmp_path / "none.yaml"), _demo())
    (tmp_path / "e.yaml").write_text("# nobody yet\n")
    with pytest.raises(InputError, match="lists no reporters"):
        security.load_allow(str(tmp_path / "e.yaml"), _demo())
    (tmp_path / "l.yaml").write_text("- a\n- b\n")
    with pytest.raises(InputError, match="must map reporter names"):
        security.load_allow(str(tmp_path / "l.yaml"), _demo())
    k = _keys(tmp_path, "a", "b")
    (tmp_path / "d.yaml").write_text(f"a: {{public_key: '{k['a']}', nodes: []}}\n"
                                     f"a: {{public_key: '{k['b']}', nodes: []}}\n")
    with pytest.raises(InputError, match=r"d.yaml:2: a: 'a' is listed twice"):
        security.load_allow(str(tmp_path / "d.yaml"), _demo())


def test_rights_follow_the_nodes() -> None:
    import numpy as np

    t = _demo()
    mask = np.zeros(t.n, dtype=bool)
    mask[t.index["w1"]] = True
    rep = security.Reporter("w1", b"k" * 40, ("w1",), mask)
    w1, w2, w3 = (t.index[x] for x in ("w1", "w2", "w3"))
    assert security.hop_rights(rep, np.array([w1, w2, w1, 99, -1])).tolist() == \
        [True, False, True, False, False]
    # a link is w1's to report only when it leaves w1: w2 -> w1 is w2's (it moves w2's routes)
    assert security.link_rights(rep, [(w1, w2, True), (w2, w1, False), (w2, w3, True)]) == \
        [True, False, False]
    assert security.may_control(rep, "health") and not security.may_control(rep, "link")
    assert not security.may_control(None, "health")
    ops = security.Reporter("ops", b"o" * 40, (), mask, control=True)
    assert all(security.may_control(ops, op) for op in security.STATE_OPS)


# ---- start-up ------------------------------------------------------------------------------
@pytest.mark.slow
def test_serve_refuses_to_start_without_a_usable_key_or_allow_file(tmp_path: Any) -> None:
    base = short_base(tmp_path)
    try:
        _, sec = security.create_keys(base, "svc")
        (tmp_path / "empty.yaml").write_text("")
        cases = [
            (["--server-key", sec], "needs both --server-key and --allow"),
            (["--allow", str(tmp_path / "empty.yaml")], "needs both"),
            (["--server-key", sec, "--allow", str(tmp_path / "none.yaml")], "no such allow file"),
            (["--server-key", sec, "--allow", str(tmp_path / "empty.yaml")], "lists no reporters"),
            (["--server-key", os.path.join(base, "svc.key"), "--allow", str(tmp_path / "empty.yaml")],
             "holds no secret key"),
        ]
        for extra, want in cases:
            r = _routerd("serve", *service_args(base), *extra)
            assert r.returncode == 2, (extra, r.stderr)
            assert "cannot start" in r.stderr and want in r.stderr, (extra, r.stderr)
            assert not os.path.exists(os.path.join(base, "state")), "wrote state before checking keys"
    finally:
        shutil.rmtree(base, ignore_errors=True)


# ---- a running CURVE service -------------------------------------------------------------
class Curve:
    """A CURVE service on ipc:// with reporters w1 (node w1), e3 (node e3), ops (control)."""

    def __init__(self, base: str, tmp: Any, *extra: str):
        kd = os.path.join(base, "keys")
        _, self.server_secret = security.create_keys(kd, "svc")
        self.server_public = security.read_public(os.path.join(kd, "svc.key"))
        self.secrets = {}
        for n in ("w1", "e3", "ops", "stranger"):
            self.secrets[n] = security.create_keys(kd, n)[1]
        allow = os.path.join(base, "allow.yaml")
        with open(allow, "w") as fh:
            fh.write("w1: {public_key: keys/w1.key, nodes: [w1]}\n"
                     "e3: {public_key: keys/e3.key, nodes: [e3]}\n"
                     "ops: {public_key: keys/ops.key, nodes: [], control: true}\n")
        self.ctx = zmq.Context()
        self.sp = ServiceProc(base, service_args(base, "--server-key", self.server_secret,
                                                 "--allow", allow, *extra))
        for line in self.sp.stdout_lines:
            if line.startswith("  control-readonly"):
                self.sp.endpoints["control_ro"] = line.split()[1]

    def sock(self, kind: int, name: str, who: str | None, timeout_ms: int = 5000) -> Any:
        s = self.ctx.socket(kind)
        s.linger = 0
        s.rcvtimeo = timeout_ms
        s.sndtimeo = timeout_ms
        if who is not None:
            security.make_client(s, self.secrets[who], self.server_public)
        s.connect(self.sp.endpoints[name])
        return s

    def send(self, who: str | None, obj: dict[str, Any], timeout_ms: int = 5000) -> dict[str, Any]:
        s = self.sock(zmq.DEALER, "ingest", who, timeout_ms)
        try:
            s.send_multipart([b"", msgpack.packb(obj, use_bin_type=True)])
            return msgpack.unpackb(s.recv_multipart()[-1], raw=False)
        finally:
            s.close(0)

    def control(self, who: str | None, req: dict[str, Any], name: str = "control",
                timeout_ms: int = 5000) -> dict[str, Any]:
        s = self.sock(zmq.REQ, name, who, timeout_ms)
        try:
            s.send(msgpack.packb(req, use_bin_type=True))
            return msgpack.unpackb(s.recv(), raw=False)
        finally:
            s.close(0)

    def close(self) -> None:
        self.sp.kill()
        self.ctx.destroy(0)


@pytest.fixture
def curve(tmp_path: Any) -> Iterator[Curve]:
    base = short_base(tmp_path)
    c = Curve(base, tmp_path, "--control-readonly", f"ipc://{base}/ro")
    try:
        yield c
    finally:
        c.close()
        shutil.rmtree(base, ignore_errors=True)


def _batch(rep: str, n: int, hops: list[list[Any]], links: list[list[Any]] = ()) -> dict[str, Any]:
    return {"v": 1, "reporter": rep, "batch": n, "hops": hops, "links": list(links)}


@pytest.mark.slow
def test_curve_service_binds_reporters_to_their_nodes(curve: Curve) -> None:
    assert any("CURVE on every ZeroMQ endpoint; 3 keys allowed" in ln for ln in curve.sp.stdout_lines)
    ack = curve.send("w1", _batch("w1", 1, [["w1", "w2", "e1", 0.01], ["w2", "w1", "e1", 0.01],
                                            ["w1", "w6", "e6", 0.01]],
                                  [["w1", "w2", "down"], ["w3", "e3", "down"], ["w2", "w1", "up"]]))
    # rows 0-2 hops, 3-5 links: w2's hop, the w3-e3 link and w2 -> w1 (it leaves w2, not w1)
    # are not w1's to report
    assert ack["accepted"] == 3, ack
    assert ack["rejected"] == [[1, "not_authorised"], [4, "not_authorised"], [5, "not_authorised"]]
    # a batch that names another reporter is refused whole
    err = curve.send("w1", _batch("e3", 2, [["e3", "w3", "w1", 0.01]]))
    assert err["error"].startswith("not_authorised:") and "'w1'" in err["error"] and err["batch"] == 2
    h = curve.control("w1", {"op": "health"})
    assert h["counts"]["observations_rejected"]["not_authorised"] == 3
    assert h["counts"]["frames_refused"]["not_authorised"] == 1
    assert h["security"] == {"curve": True, "reporters": ["w1", "e3", "ops"]}
    assert 'reason="not_authorised"' in curve.sp.metrics_text()


@pytest.mark.slow
def test_a_reporter_cannot_mark_down_a_link_that_enters_its_node(curve: Curve) -> None:
    """The key for e3 may cut e3 -> w3 (e3's own link) but not w3 -> e3: that link is w3's,
    and marking it down would move w3's routes (all of the west hall's way east)."""
    def tables() -> dict[str, Any]:
        return curve.control("e3", {"op": "tables"})["tables"]

    def neighbours(node: str) -> set[str]:
        est = curve.control("e3", {"op": "estimates", "node": node})["estimates"]
        return set().union(*(set(v) for v in est.values()))

    before = tables()
    assert before["w3"]["e3"] == [["e3", 1.0]] and before["e3"]["w3"] == [["w3", 1.0]], before
    ack = curve.send("e3", _batch("e3", 1, [], [["w3", "e3", "down"]]))
    assert ack["accepted"] == 0 and ack["rejected"] == [[0, "not_authorised"]], ack
    assert "e3" in neighbours("w3")       # the engine still has w3 -> e3 up
    ack = curve.send("e3", _batch("e3", 2, [], [["e3", "w3", "down"]]))
    assert ack["accepted"] == 1 and ack["rejected"] == [], ack
    assert "w3" not in neighbours("e3")
    # the accepted cut reaches e3's table; by then any effect of the refused one would show
    deadline = time.monotonic() + 10
    while (after := tables())["e3"]["w3"] == before["e3"]["w3"] and time.monotonic() < deadline:
        time.sleep(0.05)
    assert after["e3"]["w3"] != before["e3"]["w3"], after["e3"]
    assert after["w3"] == before["w3"]
    h = curve.control("e3", {"op": "health"})
    assert h["counts"]["observations_rejected"]["not_authorised"] == 1


@pytest.mark.slow
def test_a_server_key_others_can_read_is_warned_about_once(tmp_path: Any) -> None:
    base = short_base(tmp_path)
    try:
        kd = os.path.join(base, "keys")
        _, sec = security.create_keys(kd, "svc")
        security.create_keys(kd, "w1")
        allow = os.path.join(base, "allow.yaml")
        with open(allow, "w") as fh:
            fh.write("w1: {public_key: keys/w1.key, nodes: [w1]}\n")
        assert stat.S_IMODE(os.stat(sec).st_mode) == 0o600
        assert security.key_file_exposure(sec) is None
        assert security.key_file_exposure(os.path.join(kd, "missing.key_secret")) is None
        for mode, who in ((0o600, None), (0o640, "its group"), (0o604, "other users")):
            os.chmod(sec, mode)
            sp = ServiceProc(base, service_args(base, "--server-key", sec, "--allow", allow))
            sp.kill()                         # joins the log readers: stderr is complete
            warned = [ln for ln in sp.stderr_lines if "secret key file" in ln]
            if who is None:
                assert warned == [], warned
                continue
            assert len(warned) == 1, sp.log()
            w = warned[0]
            assert "WARN" in w and sec in w and f"mode {mode:04o}" in w and who in w, w
            assert f"chmod 600 {sec}" in w, w
    finally:
        shutil.rmtree(base, ignore_errors=True)


def _strangers_get_nothing(c: Curve) -> None:
    """A wrong key, or none, gets nothing: no ack, no control answer, no tables."""
    for who in ("stranger", None):
        with pytest.raises(zmq.Again):
            c.send(who, _batch("w1", 9, [["w1", "w2", "e1", 0.01]]), timeout_ms=800)
        with pytest.raises(zmq.Again):
            c.control(who, {"op": "health"}, timeout_ms=800)
        sub = c.sock(zmq.SUB, "publish", who, timeout_ms=800)
        sub.subscribe(b"")
        try:
            with pytest.raises(zmq.Again):
                sub.recv_multipart()
        finally:
            sub.close(0)


@pytest.mark.slow
def test_unknown_keys_and_plain_peers_get_nothing(curve: Curve) -> None:
    _strangers_get_nothing(curve)
    # an allowed key does get tables (every publish interval, at once for a new subscriber)
    sub = curve.sock(zmq.SUB, "publish", "e3", timeout_ms=5000)
    sub.subscribe(b"tables/")
    try:
        assert curve.control("ops", {"op": "snapshot"})["snapshot"]["record"] >= 1
        assert sub.recv_multipart()[0].startswith(b"tables/")
    finally:
        sub.close(0)
    assert curve.control("w1", {"op": "health"})["counts"]["batches"]["accepted"] == 0


@pytest.mark.slow
def test_state_changing_control_needs_a_control_key(curve: Curve) -> None:
    for op in ({"op": "link", "from": "w1", "to": "w2", "state": "down"}, {"op": "snapshot"},
               {"op": "reload"}):
        r = curve.control("w1", op)
        assert r["error"].startswith("not_authorised:") and "control: true" in r["error"], r
    assert curve.control("w1", {"op": "tables"})["tables"]
    r = curve.control("ops", {"op": "link", "from": "w1", "to": "w2", "state": "down"})
    assert r["link"]["changed"] is True
    r = curve.control("ops", {"op": "reload"})
    assert r["reload"]["applied"] is True and r["reload"]["needs_restart"] == []
    # the read-only endpoint: no CURVE, read-only ops only
    assert curve.control(None, {"op": "health"}, name="control_ro")["status"] == "ok"
    r = curve.control(None, {"op": "snapshot"}, name="control_ro")
    assert r["error"].startswith("not_authorised: op 'snapshot' changes state")
    h = curve.control("ops", {"op": "health"})
    assert h["counts"]["links_down"] == 1


def test_service_config_resolves_key_paths_relative_to_the_config(tmp_path: Any) -> None:
    import argparse

    (tmp_path / "c.yaml").write_text("security:\n  server_key: keys/svc.key_secret\n"
                                     "  allow: allow.yaml\n")
    p = argparse.ArgumentParser()
    service.configure(p)
    cfg = inputs.load_config(p.parse_args(["--config", str(tmp_path / "c.yaml")]))
    assert cfg["security.server_key"] == str(tmp_path / "keys" / "svc.key_secret")
    assert cfg["security.allow"] == str(tmp_path / "allow.yaml")
    cfg = inputs.load_config(p.parse_args(["--allow", "x.yaml"]))
    assert cfg["security.allow"] == os.path.abspath("x.yaml")


def test_endpoints_other_hosts_can_reach_without_curve_are_warned_about() -> None:
    import io

    from routerd.io import config

    for ep, reach in (("tcp://127.0.0.1:7301", False), ("tcp://[::1]:1", False),
                      ("ipc:///tmp/x", False), ("tcp://0.0.0.0:7301", True), ("tcp://*:1", True),
                      ("tcp://10.1.2.3:1", True), ("0.0.0.0:9307", True), ("127.0.0.1:9307", False)):
        assert security.exposed(ep) is reach, ep
    cfg = config.load(None).with_overrides({"service.control": "tcp://0.0.0.0:7303",
                                            "service.metrics": "0.0.0.0:9307"})
    svc = service.Service(cfg, _demo())
    svc.log = EventLog(stream=(buf := io.StringIO()))
    svc._warn_exposed()
    out = buf.getvalue()
    assert "endpoint=control address=tcp://0.0.0.0:7303" in out and "without CURVE" in out
    assert "metrics page reachable" in out and "endpoint=ingest" not in out
    svc = service.Service(config.load(None), _demo())       # the defaults: loopback only
    svc.log = EventLog(stream=(buf := io.StringIO()))
    svc._warn_exposed()
    assert buf.getvalue() == ""


def test_client_keys_from_files_or_z85_text_and_config_pairs(tmp_path: Any) -> None:
    _, me = security.create_keys(str(tmp_path), "me")
    svc_pub, _ = security.create_keys(str(tmp_path), "svc")
    z85 = security.read_public(svc_pub)
    k = security.ClientKeys.load(me, svc_pub)
    # pyzmq's own certificate reader is the reference for what the files hold
    assert (k.public, k.secret) == zmq.auth.load_certificate(me) and k.server_public == z85
    assert security.ClientKeys.load(me, z85.decode()) == security.ClientKeys(
        k.public, k.secret, z85, f"{me} -> service key Z85 text")
    with pytest.raises(InputError, match="holds no secret key"):
        security.ClientKeys.load(svc_pub, svc_pub)          # a public file is not our key pair
    with pytest.raises(InputError, match="no such key file"):
        security.ClientKeys.load(me, "keys/elsewhere.key")
    assert security.client_keys(None, None, "agent") is None
    with pytest.raises(InputError, match="agent.server_key is set without agent.client_key"):
        security.client_keys(None, svc_pub, "agent")
    s = zmq.Context.instance().socket(zmq.DEALER)
    try:
        assert s.getsockopt(zmq.MECHANISM) == zmq.NULL
        k.apply(s)
        assert s.getsockopt(zmq.MECHANISM) == zmq.CURVE and not s.getsockopt(zmq.CURVE_SERVER)
    finally:
        s.close(0)


@pytest.mark.slow
def test_a_sharded_front_speaks_curve_as_one_service(tmp_path: Any) -> None:
    """``serve --shards 2`` with --server-key/--allow: the front holds the reporters to
    their keys and nodes, the control right and the read-only endpoint exactly as one
    service does (the workers it starts run on local ipc:// without CURVE)."""
    base = short_base(tmp_path)
    c = Curve(base, tmp_path, "--shards", "2", "--control-readonly", f"ipc://{base}/ro")
    try:
        out = c.sp.stdout_lines
        assert any("CURVE on every ZeroMQ endpoint but the workers'; 3 keys allowed" in ln
                   for ln in out), out
        ack = c.send("w1", _batch("w1", 1, [["w1", "w2", "e1", 0.01], ["w2", "w1", "e1", 0.01],
                                            ["w1", "w6", "e6", 0.01]],
                                  [["w1", "w2", "down"], ["w3", "e3", "down"], ["w2", "w1", "up"]]))
        assert ack["accepted"] == 3, ack
        assert ack["rejected"] == [[1, "not_authorised"], [4, "not_authorised"], [5, "not_authorised"]]
        err = c.send("w1", _batch("e3", 2, [["e3", "w3", "w1", 0.01]]))
        assert err["error"].startswith("not_authorised:") and err["batch"] == 2
        # a wrong key, or none, gets nothing: no ack, no control answer, no tables
        _strangers_get_nothing(c)
        # control: state changes need the control right; reads any allowed key
        r = c.control("w1", {"op": "link", "from": "w1", "to": "w2", "state": "down"})
        assert r["error"].startswith("not_authorised:") and "control: true" in r["error"], r
        assert c.control("w1", {"op": "tables"})["tables"]["w1"]
        r = c.control("ops", {"op": "link", "from": "w3", "to": "w2", "state": "down"})
        assert r["link"]["changed"] is True, r
        h = c.control("e3", {"op": "health"})
        assert h["shards_up"] == 2 and h["security"] == {"curve": True,
                                                         "reporters": ["w1", "e3", "ops"]}
        assert h["front"]["batches_accepted"] == 1 and h["front"]["batches_refused"] == 1, h
        # the read-only endpoint: no CURVE, read-only ops only
        assert c.control(None, {"op": "health"}, name="control_ro")["status"] == "ok"
        r = c.control(None, {"op": "snapshot"}, name="control_ro")
        assert r["error"].startswith("not_authorised: op 'snapshot' changes state")
        # an allowed key gets tables
        sub = c.sock(zmq.SUB, "publish", "e3", timeout_ms=5000)
        sub.subscribe(b"tables/")
        try:
            assert sub.recv_multipart()[0].startswith(b"tables/")
        finally:
            sub.close(0)
    finally:
        c.close()
        shutil.rmtree(base, ignore_errors=True)
