"""`routerd simulate` as a user runs it: help, outputs, plots, errors."""
from __future__ import annotations

import csv
import json
import signal
import subprocess
import sys

import pytest

from routerd.tools.cli import main

REQUIRED = ("policy", "offered", "delivered", "dropped", "ttl_expired", "mean_delivery_s",
            "p50_delivery_s", "p95_delivery_s", "p99_delivery_s", "mean_hops", "events", "wall_s")


def test_help_lists_the_contract_flags() -> None:
    out = subprocess.run([sys.executable, "-m", "routerd", "simulate", "--help"],
                         capture_output=True, text=True, check=True).stdout
    for flag in ("--topology", "--policy", "--rate", "--duration", "--seed", "--packet-bytes",
                 "--size-dist", "--warmup", "--scenario", "--demands", "--plot", "--out",
                 "--config", "--set", "--capacity-bps", "--buffer-pkts"):
        assert flag in out


def test_a_run_writes_summary_csv_and_pngs(tmp_path, capsys) -> None:
    sc = tmp_path / "burst.yaml"
    sc.write_text("scenario:\n  load:\n    - {burst: 2.0, from_s: 2, to_s: 6, on_s: 1, off_s: 1}\n"
                  "  links:\n    - {at_s: 4, between: [w3, e3], down: true}\n")
    out = tmp_path / "out"
    rc = main(["simulate", "--policy", "qrouting", "--rate", "500", "--duration", "8", "--seed", "3",
               "--scenario", str(sc), "--plot", "--out", str(out), "--set", "sim.feedback=instant",
               "--quiet"])
    assert rc == 0
    s = json.loads((out / "summary.json").read_text())
    for k in REQUIRED:
        assert k in s
    assert s["policy"] == "qrouting" and s["offered"] > 1000
    with open(out / "series.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    assert rows[0][:6] == ["t_s", "delivered", "mean_delivery_s", "dropped", "ttl_expired", "in_network"]
    assert "util:w3->e3" in rows[0] and len(rows) == 9
    assert (out / "links.csv").exists()
    import matplotlib.image as mpimg
    import numpy as np

    for name in ("delivery.png", "utilisation.png"):
        img = mpimg.imread(out / name)
        assert img.shape[0] > 200 and img.shape[1] > 200
        # not blank: many distinct colours, not one flat fill
        flat = img[..., :3].reshape(-1, 3)
        assert flat.std() > 0.05 and len(np.unique(flat.round(2), axis=0)) > 20
    assert "wrote" in capsys.readouterr().out


def test_same_inputs_same_summary(tmp_path) -> None:
    outs = []
    for i in range(2):
        o = tmp_path / f"o{i}"
        assert main(["simulate", "--policy", "ecmp", "--rate", "300", "--duration", "4",
                     "--seed", "9", "--out", str(o), "--quiet"]) == 0
        s = json.loads((o / "summary.json").read_text())
        s.pop("wall_s")
        outs.append(s)
    assert outs[0] == outs[1]


def test_a_run_of_many_packets_is_announced_as_long(tmp_path, capsys, monkeypatch) -> None:  # type: ignore[no-untyped-def]
    from routerd.sim import commands_simulate as CS

    args = ["simulate", "--policy", "shortest", "--rate", "300", "--duration", "2", "--seed", "1",
            "--quiet"]
    assert main(args + ["--out", str(tmp_path / "a")]) == 0
    assert "a long run" not in capsys.readouterr().err
    monkeypatch.setattr(CS, "LONG_RUN_PACKETS", 600)      # 300/s x 2 s reaches it
    assert main(args + ["--out", str(tmp_path / "b")]) == 0
    err = capsys.readouterr().err
    assert "about 600 packets to inject (--rate x --duration): a long run" in err, err
    assert "Ctrl-C ends it" in err


def test_bad_inputs_exit_2_with_every_problem(tmp_path, capsys) -> None:
    bad = tmp_path / "bad.yaml"
    bad.write_text("scenario:\n  load:\n    - {step: -2, at_s: 1}\n  links:\n    - {at_s: 1, from: w3, to: mars, down: true}\n")
    rc = main(["simulate", "--policy", "shortest", "--rate", "10", "--duration", "1", "--seed", "1",
               "--scenario", str(bad), "--out", str(tmp_path / "o")])
    assert rc == 2
    err = capsys.readouterr().err
    assert "scenario.load[0].step: -2 must be >= 0" in err
    rc = main(["simulate", "--policy", "shortest", "--rate", "10", "--duration", "1", "--seed", "1",
               "--topology", str(tmp_path / "missing.yaml"), "--out", str(tmp_path / "o")])
    assert rc == 2 and "does not exist" in capsys.readouterr().err
    try:  # argparse may refuse it (exit 2) or the run's own check (return 2)
        rc = main(["simulate", "--policy", "teleport", "--rate", "1", "--duration", "1",
                   "--seed", "1", "--out", str(tmp_path / "o")])
    except SystemExit as e:
        rc = e.code
    assert rc == 2 and "teleport" in capsys.readouterr().err
    assert not (tmp_path / "o" / "summary.json").exists()


def test_a_negative_seed_is_refused_before_the_run(tmp_path, capsys) -> None:
    # numpy's SeedSequence takes whole numbers >= 0 only: --seed -1 ended in its traceback
    rc = main(["simulate", "--policy", "shortest", "--rate", "10", "--duration", "1", "--seed", "-1",
               "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert rc == 2 and "--seed: -1 must be a whole number >= 0" in err
    assert "Traceback" not in err and not (tmp_path / "o" / "summary.json").exists()


def test_many_problems_are_summarised_with_a_hint(tmp_path, capsys) -> None:
    rc = main(["simulate", "--topology", "topohub:sndlib/abilene", "--policy", "shortest",
               "--rate", "10", "--duration", "1", "--seed", "1", "--out", str(tmp_path / "o")])
    assert rc == 2
    err = capsys.readouterr().err.splitlines()
    assert err[0].startswith("routerd simulate: ") and "problem(s)" in err[0]
    assert sum(1 for ln in err if ln.startswith("  topohub:")) == 12
    assert any("more (routerd validate lists them all)" in ln for ln in err)
    assert err[-1].startswith("hint: --capacity-bps and --buffer-pkts")


@pytest.mark.slow
def test_ctrl_c_keeps_what_finished_marked_partial_exit_130(tmp_path) -> None:
    out = tmp_path / "o"
    sc = tmp_path / "cut.yaml"         # one link event early, one far beyond any cut
    sc.write_text("scenario:\n  links:\n    - {at_s: 1, between: [w3, e3], down: true}\n"
                  "    - {at_s: 90000, between: [w3, e3], up: true}\n")
    proc = subprocess.Popen(
        [sys.executable, "-m", "routerd", "simulate", "--policy", "qrouting", "--rate", "1500",
         "--duration", "100000", "--warmup", "0.5", "--seed", "3", "--scenario", str(sc), "--plot", "--out", str(out)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        # 1.5e8 packets asked: announced as a long run before it starts
        warned = proc.stderr.readline()
        assert "a long run" in warned, warned
        # off a terminal the first progress line comes after 2 s of simulating: under way
        first = proc.stderr.readline()
        assert first.startswith("["), (first, proc.stderr.read() if proc.poll() is not None else "")
        proc.send_signal(signal.SIGINT)
        stdout, rest = proc.communicate(timeout=120)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        proc.stdout.close()
        proc.stderr.close()
    stderr = first + rest
    assert proc.returncode == 130, (stdout, stderr)
    assert "\r" not in stderr and "interrupted at t=" in stderr
    s = json.loads((out / "summary.json").read_text())
    assert s["interrupted"] is True and s["duration_s"] == 100000
    reached = s["reached_s"]
    assert 1.0 < reached < 100000
    assert s["offered"] == s["delivered"] + s["dropped"] + s["ttl_expired"] + s["in_flight_at_end"]
    assert s["offered"] > 0 and s["delivered"] > 0
    with open(out / "series.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    # every completed interval, none past the cut
    assert rows and reached - 1.0 <= float(rows[-1]["t_s"]) <= reached
    assert [float(r["t_s"]) for r in rows] == [float(i + 1) for i in range(len(rows))]
    assert (out / "links.csv").exists() and (out / "delivery.png").exists()
    lines = stdout.splitlines()
    assert lines[0].startswith(f"PARTIAL: interrupted at t={reached:.2f} of 100000 s")
    assert any(ln.startswith("wrote ") and ln.endswith("summary.json (partial)") for ln in lines)
