"""deploy/: systemd units, the container build file, Prometheus config, alerting rules and
the dashboard — checked with the tools that read them (promtool, systemd-analyze) where they
are installed (skipped with the reason otherwise), and against the metric names routerd
really exports (prometheus_client's own text parser reads them back)."""
from __future__ import annotations

import json
import os
import re
import shlex
import shutil
import subprocess
from types import SimpleNamespace

import pytest
import yaml
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client.parser import text_string_to_metric_families

from routerd.agent import forwarder as A
from routerd.core.engine import Engine
from routerd.io import topofiles as TF
from routerd.io import wire
from routerd.service import metrics as M
from routerd.tools import cli

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEPLOY = os.path.join(ROOT, "deploy")
PROMTOOL = shutil.which("promtool")
needs_promtool = pytest.mark.skipif(PROMTOOL is None, reason="promtool not installed "
                                    "(apt-get install prometheus provides it; .ci/run installs it)")


def _promtool(*args: str) -> subprocess.CompletedProcess[str]:
    assert PROMTOOL is not None
    return subprocess.run([PROMTOOL, *args], cwd=DEPLOY, capture_output=True, text=True, timeout=60,
                          check=False)


@needs_promtool
def test_promtool_check_config() -> None:
    r = _promtool("check", "config", "prometheus.yml")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "SUCCESS" in r.stdout + r.stderr


@needs_promtool
def test_promtool_check_rules() -> None:
    r = _promtool("check", "rules", "routerd-alerts.yml")
    assert r.returncode == 0, r.stdout + r.stderr
    assert "7 rules found" in r.stdout + r.stderr


@needs_promtool
def test_promtool_unit_tests_of_the_alerts() -> None:
    # promtool evaluates the rules on the invented series of routerd-alerts.test.yml
    r = _promtool("test", "rules", "routerd-alerts.test.yml")
    assert r.returncode == 0, r.stdout + r.stderr


def exported_samples() -> dict[str, list[dict[str, str]]]:
    """Every sample name (with its label sets) the service's collector and an agent export."""
    topo = TF.load(os.path.join(ROOT, "configs", "lab-small.yaml"))
    eng = Engine(topo)
    src = SimpleNamespace(
        counters=M.Counters(row_reasons=wire.REASONS + ("duplicate",), frame_reasons=wire.FRAME_ERRORS),
        engine_statistics=eng.statistics, journal_bytes=lambda: 0, snapshot_age_s=lambda: None,
        uptime_s=lambda: 1.0, info=lambda: {"version": "0", "topology": topo.digest})
    reg = CollectorRegistry(auto_describe=False)
    reg.register(M.RouterdCollector(src))
    areg = CollectorRegistry()
    A.AgentMetrics(areg)
    out: dict[str, list[dict[str, str]]] = {"up": [{"job": "routerd"}]}   # Prometheus's own
    for r in (reg, areg):
        for fam in text_string_to_metric_families(generate_latest(r).decode()):
            for s in fam.samples:
                out.setdefault(s.name, []).append(dict(s.labels))
    return out


SELECTOR = re.compile(r"\b(routerd_[a-z0-9_]+|up)(\{[^}]*\})?")


def _exprs() -> list[tuple[str, str]]:
    with open(os.path.join(DEPLOY, "routerd-alerts.yml")) as fh:
        rules = yaml.safe_load(fh)
    out = [(f"alert {r['alert']}", r["expr"]) for g in rules["groups"] for r in g["rules"]]
    with open(os.path.join(DEPLOY, "dashboard.json")) as fh:
        dash = json.load(fh)
    out += [(f"panel {p['title']!r}", q["expr"]) for row in dash["rows"] for p in row["panels"]
            for q in p["queries"]]
    return out


def test_alerts_and_dashboard_use_real_metric_names_and_labels() -> None:
    have = exported_samples()
    seen = set()
    for where, expr in _exprs():
        for m in SELECTOR.finditer(expr):
            name, sel = m.group(1), m.group(2)
            seen.add(name)
            assert name in have, f"{where}: {name} is not exported (have: {sorted(have)})"
            if sel:
                for k, v in re.findall(r'(\w+)="([^"]*)"', sel):
                    if k in ("job", "instance"):
                        continue   # target labels, added by Prometheus
                    assert any(ls.get(k) == v for ls in have[name]), f"{where}: no {name} with {k}={v!r}"
    # the alert set and dashboard panels are all there
    alerts = {w for w, _ in _exprs() if w.startswith("alert ")}
    for a in ("RouterdServiceDown", "RouterdNoObservations", "RouterdTDErrorHigh",
              "RouterdLoopsPreventedRising", "RouterdSnapshotsStale"):
        assert f"alert {a}" in alerts
    for must in ("routerd_agent_delivery_seconds_bucket", "routerd_observations_total",
                 "routerd_exploration_share", "routerd_route_changes_total"):
        assert must in seen


def _unit(name: str) -> dict[str, list[str]]:
    keys: dict[str, list[str]] = {}
    with open(os.path.join(DEPLOY, name)) as fh:
        for line in fh:
            line = line.strip()
            if line and not line.startswith(("#", "[")) and "=" in line:
                k, v = line.split("=", 1)
                keys.setdefault(k, []).append(v)
    return keys


@pytest.mark.parametrize("unit,command", [("routerd.service", "serve"), ("routerd-agent@.service", "agent")])
def test_units_are_hardened_and_call_real_flags(unit: str, command: str) -> None:
    k = _unit(unit)
    for key, val in (("DynamicUser", "yes"), ("ProtectSystem", "strict"), ("Restart", "on-failure"),
                     ("NoNewPrivileges", "yes"), ("ProtectHome", "yes"), ("PrivateTmp", "yes")):
        assert k.get(key) == [val], (unit, key)
    if command == "serve":
        assert k["StateDirectory"] == ["routerd"]
    argv = shlex.split(k["ExecStart"][0].replace("%i", "w1").replace("$ROUTERD_AGENT_ARGS", ""))
    assert argv[0].endswith("/routerd") and argv[1] == command
    cli.build_parser().parse_args(argv[1:])     # every flag exists (SystemExit otherwise)


def _env(name: str) -> dict[str, str]:
    with open(os.path.join(DEPLOY, name)) as fh:
        return dict(ln.strip().split("=", 1) for ln in fh if ln.strip() and not ln.startswith("#"))


def _argv(unit: str, instance: str = "0") -> list[str]:
    """A unit's ExecStart as systemd would run it: %i and ${VAR}s from its EnvironmentFile
    (deploy/ holds the example, installed as /etc/routerd/NAME)."""
    k = _unit(unit)
    line = k["ExecStart"][0].replace("%i", instance)
    for f in k.get("EnvironmentFile", []):
        for var, val in _env(os.path.basename(f)).items():
            line = line.replace("${" + var + "}", val)
    assert "${" not in line, line
    return shlex.split(line)


@pytest.mark.parametrize("unit", ["routerd-front.service", "routerd-shard@.service"])
def test_shard_units_are_hardened_and_call_real_flags(unit: str) -> None:
    k = _unit(unit)
    for key, val in (("DynamicUser", "yes"), ("ProtectSystem", "strict"), ("Restart", "on-failure"),
                     ("NoNewPrivileges", "yes"), ("ProtectHome", "yes"), ("PrivateTmp", "yes"),
                     ("StateDirectory", "routerd"), ("User", "routerd"),
                     ("Conflicts", "routerd.service")):
        assert k.get(key) == [val], (unit, key)
    argv = _argv(unit)
    assert argv[0].endswith("/routerd") and argv[1] == "serve"
    cli.build_parser().parse_args(argv[1:])     # every flag exists (SystemExit otherwise)


def test_shard_units_agree_with_each_other_and_with_prometheus() -> None:
    """The front waits for ROUTERD_SHARDS external workers on the endpoint every worker
    announces itself to, both run on one state dir, and Prometheus scrapes one page per
    worker (shard.metrics_port_base + K, the base named in the file's comment)."""
    parser = cli.build_parser()
    n = int(_env("shards.env")["ROUTERD_SHARDS"])
    front = parser.parse_args(_argv("routerd-front.service")[1:])
    assert front.shards == n and front.external_workers and front.shard is None
    ws = [parser.parse_args(_argv("routerd-shard@.service", str(i))[1:]) for i in range(n)]
    assert [w.shard for w in ws] == [f"{i}/{n}" for i in range(n)]
    for w in ws:
        assert w.upstream == front.shard_listen and w.state_dir == front.state_dir
        assert w.config == front.config and w.metrics is None   # port from the config's base
    assert len({w.ingest for w in ws}) == n               # each its own endpoints
    with open(os.path.join(DEPLOY, "prometheus.yml")) as fh:
        prom = yaml.safe_load(fh)
    job = next(j for j in prom["scrape_configs"] if j["job_name"] == "routerd-shard")
    with open(os.path.join(DEPLOY, job["file_sd_configs"][0]["files"][0])) as fh:
        text = fh.read()
    base = int(re.search(r"\((\d+) \+ K here\)", text).group(1))   # type: ignore[union-attr]
    targets = [t for g in yaml.safe_load(text) for t in g["targets"]]
    assert targets == [f"127.0.0.1:{base + i}" for i in range(n)]


@pytest.mark.skipif(shutil.which("systemd-analyze") is None, reason="systemd-analyze not installed")
def test_systemd_analyze_verify(tmp_path: object) -> None:
    units = [os.path.join(DEPLOY, "routerd.service"), os.path.join(DEPLOY, "routerd-front.service")]
    # a template is verified through an instance of it
    inst = os.path.join(str(tmp_path), "routerd-agent@w1.service")
    shutil.copy(os.path.join(DEPLOY, "routerd-agent@.service"), inst)
    winst = os.path.join(str(tmp_path), "routerd-shard@0.service")
    shutil.copy(os.path.join(DEPLOY, "routerd-shard@.service"), winst)
    r = subprocess.run(["systemd-analyze", "verify", *units, inst, winst], capture_output=True,
                       text=True, timeout=60, check=False)
    lines = [ln for ln in (r.stdout + r.stderr).splitlines()
             if ln.strip() and "is not executable" not in ln]   # routerd is not installed here
    assert lines == [], lines


def test_containerfile() -> None:
    with open(os.path.join(DEPLOY, "Containerfile")) as fh:
        text = fh.read()
    instr = [ln.split(None, 1) for ln in text.splitlines() if ln and not ln.startswith(("#", " "))]
    words = [i[0] for i in instr]
    assert words[0] == "FROM" and "USER" in words and "ENTRYPOINT" in words
    user = [i[1] for i in instr if i[0] == "USER"][-1]
    assert not user.startswith(("root", "0"))
    for i in instr:
        if i[0] == "COPY" and not i[1].startswith("--from"):
            for src in i[1].split()[:-1]:
                assert os.path.exists(os.path.join(ROOT, src)), src
    ep = json.loads(next(i[1] for i in instr if i[0] == "ENTRYPOINT"))
    cmd = json.loads(next(i[1] for i in instr if i[0] == "CMD"))
    assert ep[1] == "serve"
    cli.build_parser().parse_args(ep[1:] + cmd)
