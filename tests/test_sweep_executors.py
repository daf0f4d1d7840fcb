"""``routerd sweep`` across executors (sim/executors.py, and the spec/progress/interruption
parts of sim/commands_sweep.py): specs are plain data that need none of the caller's
files, the table is the same from the local pool and from a Dask LocalCluster, a failing
run is a row under both, progress arrives from within runs, Ctrl-C keeps what finished,
and a missing dask is a clear exit 2."""
from __future__ import annotations

import csv
import io
import json
import os
import pickle
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import redirect_stdout
from typing import Any

import pytest

from routerd.sim import commands_sweep as sw
from routerd.sim import executors as ex
from routerd.tools import cli

TOPO = """\
topology:
  name: tmp-ring
  nodes: [a, b, c, d]
  links:
    - {from: a, to: b, delay_s: 0.002}
    - {from: b, to: c, delay_s: 0.002}
    - {from: c, to: d, delay_s: 0.002}
    - {from: d, to: a, delay_s: 0.002}
"""
SCEN = """\
scenario:
  name: tmp-step
  load:
    - {step: 1.5, at_s: 1.0}
  links:
    - {at_s: 1.5, from: b, to: c, down: true}
"""


def _plain_only(v: Any, where: str = "spec") -> Iterator[str]:
    """Every place in ``v`` that is not plain data (dict/list/tuple/str/number/bool/None)."""
    if isinstance(v, dict):
        for k, x in v.items():
            if not isinstance(k, str):
                yield f"{where}: key {k!r}"
            yield from _plain_only(x, f"{where}.{k}")
    elif isinstance(v, (list, tuple)):
        for i, x in enumerate(v):
            yield from _plain_only(x, f"{where}[{i}]")
    elif not (v is None or isinstance(v, (str, bool, int, float))):
        yield f"{where}: {type(v).__name__}"


def _strings(v: Any) -> Iterator[str]:
    if isinstance(v, dict):
        for k, x in v.items():
            yield str(k)
            yield from _strings(x)
    elif isinstance(v, (list, tuple)):
        for x in v:
            yield from _strings(x)
    elif isinstance(v, str):
        yield v


def _no_wall(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    return [{k: v for k, v in r.items() if k != "wall_s"} for r in rows]


def test_specs_are_plain_data_without_paths_and_run_after_the_folder_is_gone(
        tmp_path: os.PathLike[str]) -> None:
    folder = os.path.join(str(tmp_path), "inputs")
    os.makedirs(folder)
    for name, text in (("ring.yaml", TOPO), ("step.yaml", SCEN)):
        with open(os.path.join(folder, name), "w") as fh:
            fh.write(text)
    with open(os.path.join(folder, "cfg.yaml"), "w") as fh:
        fh.write(f"topology:\n  file: {os.path.join(folder, 'ring.yaml')}\n"
                 "  default_capacity_bps: 2.0e6\n  default_buffer_pkts: 40\nsim:\n  ttl: 40\n")
    spec = {"policy": "mindelay", "rate_pps": 150.0, "seed": 3, "duration_s": 2.0,
            "series": False, "scenario": os.path.join(folder, "step.yaml"),
            "config": os.path.join(folder, "cfg.yaml"), "overrides": ("sim.ttl=33",)}
    from_files = sw.run_one(spec)
    assert "error" not in from_files, from_files
    [inline] = sw.inline_specs([spec])
    assert list(_plain_only(inline)) == []
    assert not [s for s in _strings(inline) if folder in s or s.endswith(".yaml")]
    assert inline["config"]["sim"]["ttl"] == 33          # the override travels, applied
    assert inline["topology"]["topology"]["name"] == "tmp-ring"
    blob = pickle.dumps(inline)
    shutil.rmtree(folder)
    row = sw.run_one(pickle.loads(blob))
    assert "error" not in row, row
    assert row["topology"] == "tmp-ring" and row["offered"] > 0
    # the same run, bit for bit, whether its inputs came from files or travelled inline
    assert repr(_no_wall([row])) == repr(_no_wall([from_files]))
    assert list(_plain_only(row, "row")) == []


def test_a_worker_of_another_routerd_version_fails_its_row_with_a_reason() -> None:
    [spec] = sw.inline_specs([{"policy": "shortest", "rate_pps": 100.0, "seed": 1,
                               "duration_s": 1.0, "series": False}])
    row = sw.run_one({**spec, "routerd_version": "0.0.0-other"})
    assert "same version on every worker" in row["error"]


def _recorder(calls: list[tuple[int, int, float]]) -> Any:
    def on_done(done: int, total: int, partial: float = 0.0) -> None:
        calls.append((done, total, partial))
    return on_done


def test_progress_arrives_from_within_runs(monkeypatch: pytest.MonkeyPatch) -> None:
    # reports at every sample (the local pool's workers fork after the patch, so they see it)
    monkeypatch.setattr(sw, "REPORT_EVERY_S", 0.0)
    # the reference loop: the compiled one can finish a run before its first report has
    # crossed the pool's queue, and then there is no "while" to see
    specs = [{"policy": "mindelay", "rate_pps": 2000.0, "seed": s, "duration_s": 40.0,
              "series": False, "overrides": ["engine.kernels=reference"]} for s in (1, 2)]
    for jobs in (1, 2):
        calls: list[tuple[int, int, float]] = []
        sw.run_grid(specs, jobs=jobs, on_done=_recorder(calls))
        assert calls[-1][:2] == (2, 2)
        # while runs were going, the bar had their simulated time to show
        assert any(d < 2 and 0 < p < 2 - d for d, _, p in calls), (jobs, calls[:5])


def test_progress_bar_moves_within_runs() -> None:
    class Log(io.StringIO):
        def isatty(self) -> bool:
            return False

    log = Log()
    bar = sw.ProgressBar(2, stream=log, after_s=0.0)
    bar.update(0, 0.5)
    bar.update(0, 1.2)
    assert log.getvalue().splitlines() == [
        line for line in log.getvalue().splitlines() if "0/2 runs" in line]
    assert log.getvalue().splitlines()[0].startswith("25%") and "60%" in log.getvalue()


def _spec(seed: int) -> dict[str, Any]:
    return {"policy": "shortest", "rate_pps": 100.0, "seed": seed, "duration_s": 1.0,
            "series": False}


def test_ctrl_c_in_process_keeps_the_finished_rows(monkeypatch: pytest.MonkeyPatch) -> None:
    real = sw.run_sim

    def run_sim(spec: Any, **kw: Any) -> Any:
        if spec["seed"] == 2:
            raise KeyboardInterrupt
        return real(spec, **kw)

    monkeypatch.setattr(sw, "run_sim", run_sim)
    with pytest.raises(sw.Interrupted) as e:
        sw.run_grid([_spec(1), _spec(2), _spec(3)], jobs=1)
    assert [r["seed"] for r in e.value.rows] == [1] and e.value.total == 3
    assert "error" not in e.value.rows[0]


def test_a_worker_lost_mid_run_is_an_error_row_not_a_crash(
        monkeypatch: pytest.MonkeyPatch) -> None:
    # the pool's workers fork after the patch: the one that gets seed 2 dies on the spot
    real = sw.run_sim

    def run_sim(spec: Any, **kw: Any) -> Any:
        if spec["seed"] == 2:
            os._exit(3)
        return real(spec, **kw)

    monkeypatch.setattr(sw, "run_sim", run_sim)
    rows = sw.run_grid([_spec(1), _spec(2)], jobs=2)
    assert [r["seed"] for r in rows] == [1, 2]
    assert "error" in rows[1] and "BrokenProcessPool" in rows[1]["error"]


def test_missing_dask_is_a_clear_exit_2(tmp_path: os.PathLike[str],
                                        monkeypatch: pytest.MonkeyPatch,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setitem(sys.modules, "distributed", None)   # import distributed -> ImportError
    out = os.path.join(str(tmp_path), "o")
    rc = cli.main(["sweep", "--rates", "100", "--policies", "shortest", "--seeds", "1",
                   "--duration", "1", "--executor", "dask", "--quiet", "--out", out])
    err = capsys.readouterr().err
    assert rc == 2
    assert "pip install 'routerd[cluster]'" in err and "--executor dask" in err
    assert not os.path.exists(out)


def test_executor_flags_that_cannot_mean_anything_are_rejected(
        tmp_path: os.PathLike[str], capsys: pytest.CaptureFixture[str]) -> None:
    out = os.path.join(str(tmp_path), "o")
    base = ["sweep", "--rates", "100", "--seeds", "1", "--out", out]
    assert cli.main(base + ["--scheduler", "tcp://127.0.0.1:1"]) == 2
    assert "--scheduler: 'tcp://127.0.0.1:1' needs --executor dask" in capsys.readouterr().err
    assert cli.main(base + ["--executor", "dask", "--scheduler", "tcp://127.0.0.1:1",
                            "--jobs", "3"]) == 2
    assert "--jobs: 3 has no effect with a Dask scheduler" in capsys.readouterr().err
    assert cli.main(base + ["--set", "sim.executor=cloud"]) == 2
    assert "sim.executor" in capsys.readouterr().err
    assert not os.path.exists(out)


# ---- the slow ones: real pools, a Dask LocalCluster, a real Ctrl-C ------------------------

TINY = ["sweep", "--rates", "300,1500", "--policies", "shortest,mindelay", "--seeds", "2",
        "--duration", "2", "--no-plot", "--quiet"]


def _table(out: str) -> tuple[list[str], list[list[str]]]:
    with open(os.path.join(out, "sweep.csv"), newline="") as fh:
        rows = list(csv.reader(fh))
    head, body = rows[0], rows[1:]
    w = head.index("wall_s")     # the one column that is a measurement, not a result
    return ([c for i, c in enumerate(head) if i != w],
            [[c for i, c in enumerate(r) if i != w] for r in body])


@pytest.mark.slow
def test_local_pool_and_dask_write_the_same_table(tmp_path: os.PathLike[str]) -> None:
    outs, printed = {}, {}
    for kind, extra in (("local", ["--jobs", "2"]), ("dask", [])):
        outs[kind] = os.path.join(str(tmp_path), kind)
        buf = io.StringIO()
        with redirect_stdout(buf):
            assert cli.main(TINY + ["--executor", kind, "--out", outs[kind]] + extra) == 0
        # the printed table: everything from the header on (the first line names the executor)
        printed[kind] = buf.getvalue().splitlines()[1:]
    assert _table(outs["local"]) == _table(outs["dask"])
    assert len(_table(outs["local"])[1]) == 8
    assert len(printed["local"]) > 5 and [
        line for line in printed["local"] if not line.startswith("wrote")] == [
        line for line in printed["dask"] if not line.startswith("wrote")]
    docs = {}
    for kind, out in outs.items():
        with open(os.path.join(out, "sweep.json")) as fh:
            docs[kind] = json.load(fh)
    assert docs["local"]["points"] == docs["dask"]["points"]
    assert repr(_no_wall(docs["local"]["runs"])) == repr(_no_wall(docs["dask"]["runs"]))
    assert docs["dask"]["sweep"]["executor"] == "dask" and not docs["dask"]["sweep"]["partial"]


@pytest.fixture(scope="module")
def dask_pool() -> Iterator[ex.Pool]:
    pool = ex.open_pool("dask", None)
    try:
        yield pool
    finally:
        pool.close()


@pytest.mark.slow
def test_a_failing_run_is_a_row_under_both_executors(dask_pool: ex.Pool) -> None:
    good = sw.inline_specs([{"policy": "shortest", "rate_pps": 200.0, "seed": 1,
                             "duration_s": 1.0, "series": False}])[0]
    # plain data that fails on the worker: a topology document with a link to nowhere
    bad_topo = {"topology": {"name": "broken", "nodes": ["a", "b"],
                             "links": [{"from": "a", "to": "zz", "delay_s": 0.001}]}}
    specs = [good, {**good, "seed": 2, "topology": bad_topo}, {**good, "seed": 3}]
    local = sw.run_grid(specs, jobs=2)
    dask = sw.run_grid(specs, pool=dask_pool)
    for rows in (local, dask):
        assert [("error" in r) for r in rows] == [False, True, False]
        assert rows[1]["seed"] == 2 and "zz" in rows[1]["error"]
    assert repr(_no_wall(local)) == repr(_no_wall(dask))   # repr: NaN equals NaN, floats exact


@pytest.mark.slow
def test_dask_workers_report_progress_within_runs(dask_pool: ex.Pool) -> None:
    # one run of a second or two (REPORT_EVERY_S = 0.5 on the workers): reports arrive
    # through the scheduler's queue before the run finishes
    spec = sw.inline_specs([{"policy": "mindelay", "rate_pps": 5000.0, "seed": 1,
                             "duration_s": 60.0, "series": False}])[0]
    calls: list[tuple[int, int, float]] = []
    rows = sw.run_grid([spec], on_done=_recorder(calls), pool=dask_pool)
    assert "error" not in rows[0]
    assert any(d == 0 and 0 < p < 1 for d, _, p in calls), calls[:5]


def _interrupt(kind: str, out: str) -> tuple[int, str, str]:
    # one short run and one long one on two workers: wait until the short one is done,
    # then Ctrl-C (SIGINT to the command's process only)
    cmd = [sys.executable, "-m", "routerd", "sweep", "--rates", "20,4000", "--policies",
           "mindelay", "--seeds", "1", "--duration", "600", "--jobs", "2",
           "--executor", kind, "--out", out]
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    p = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
    assert p.stderr is not None
    seen = []
    deadline = time.monotonic() + 90
    try:
        for line in p.stderr:
            seen.append(line)
            if "1/2 runs" in line:
                break
            assert time.monotonic() < deadline, "".join(seen)
        p.send_signal(signal.SIGINT)
        stdout, rest = p.communicate(timeout=60)
    finally:
        if p.poll() is None:
            p.kill()
            p.wait()
    return p.returncode, stdout, "".join(seen) + rest


@pytest.mark.slow
@pytest.mark.parametrize("kind", ["local", "dask"])
def test_ctrl_c_keeps_and_writes_the_finished_rows(tmp_path: os.PathLike[str], kind: str) -> None:
    out = os.path.join(str(tmp_path), "o")
    rc, stdout, stderr = _interrupt(kind, out)
    assert rc == 130, stderr
    assert "interrupted: 1 of 2 runs finished" in stdout
    assert "kept 1 finished run(s) of 2" in stderr
    with open(os.path.join(out, "sweep.csv"), newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [(r["rate_pps"], r["seed"]) for r in rows] == [("20", "1")]
    with open(os.path.join(out, "sweep.json")) as fh:
        doc = json.load(fh)
    assert doc["sweep"]["partial"] is True and doc["sweep"]["runs_finished"] == 1
    assert doc["sweep"]["runs"] == 2 and len(doc["points"]) == 1
    assert os.path.getsize(os.path.join(out, "sweep.png")) > 1000


def _free_port() -> int:
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.mark.slow
def test_a_scheduler_and_a_worker_elsewhere_need_none_of_the_callers_files(
        tmp_path: os.PathLike[str]) -> None:
    # the README's two-host setup on loopback: `dask scheduler`, and `dask worker` started in
    # an empty folder of its own; the inputs are files in a folder only the caller sees
    dask_cli = os.path.join(os.path.dirname(sys.executable), "dask")
    if not os.path.exists(dask_cli):
        pytest.skip(f"no dask command beside {sys.executable}")
    root = str(tmp_path)
    inputs, away = os.path.join(root, "inputs"), os.path.join(root, "worker-cwd")
    os.makedirs(inputs)
    os.makedirs(away)
    for name, text in (("ring.yaml", TOPO), ("step.yaml", SCEN)):
        with open(os.path.join(inputs, name), "w") as fh:
            fh.write(text)
    addr = f"tcp://127.0.0.1:{_free_port()}"
    procs = [subprocess.Popen([dask_cli, "scheduler", "--host", "127.0.0.1", "--port",
                               addr.rsplit(":", 1)[1], "--dashboard-address", "127.0.0.1:0"],
                              stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, cwd=away)]
    try:
        procs.append(subprocess.Popen([dask_cli, "worker", addr, "--nthreads", "1",
                                       "--nworkers", "1", "--host", "127.0.0.1"],
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                      cwd=away))
        args = ["sweep", "--topology", os.path.join(inputs, "ring.yaml"), "--scenario",
                os.path.join(inputs, "step.yaml"), "--capacity-bps", "2e6", "--buffer-pkts",
                "30", "--rates", "200,900", "--policies", "shortest,mindelay", "--seeds", "1",
                "--duration", "3", "--no-plot", "--quiet"]
        out_remote, out_local = os.path.join(root, "remote"), os.path.join(root, "local")
        buf = io.StringIO()
        with redirect_stdout(buf):
            rc = cli.main(args + ["--executor", "dask", "--scheduler", addr, "--out", out_remote])
        assert rc == 0, buf.getvalue()
        assert f"on the Dask scheduler {addr}" in buf.getvalue()
        assert cli.main(args + ["--jobs", "1", "--out", out_local]) == 0
        assert _table(out_remote) == _table(out_local)
        assert len(_table(out_remote)[1]) == 4
    finally:
        for p in reversed(procs):
            p.terminate()
        for p in reversed(procs):
            try:
                p.wait(timeout=30)
            except subprocess.TimeoutExpired:
                p.kill()
                p.wait()
