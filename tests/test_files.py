"""Reading inputs and checking outputs (routerd/io/files.py, routerd/io/values.py; issue 16).

Every unusable input or output path is an error naming it (exit 2 in a command, a
problem in ``validate``), found before any work starts; number fields take YAML's float
spellings everywhere.
"""
from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import pytest
import yaml

from routerd.core.errors import InputError
from routerd.io import config, files, scenario, topofiles, values
from routerd.tools import cli

ROOT = Path(__file__).resolve().parent.parent


# ---- numbers ------------------------------------------------------------------------------
@pytest.mark.parametrize("text,want", [
    ("1.0e6", 1e6), ("1e6", 1e6), ("2E-3", 2e-3), ("+1.5e+2", 150.0), (".5e1", 5.0),
    ("10.0e6", 1e7), ("12", 12), ("-3", -3), ("0.25", 0.25)])
def test_yaml_float_spellings_are_numbers(text: str, want: float) -> None:
    # YAML 1.2 core schema float (yaml.org/spec/1.2.2, 10.2.1.4); PyYAML's 1.1 rules read
    # the exponent forms without a sign or a dot as strings (checked here, common practice)
    assert values.as_number(text) == want
    assert files.parse_yaml(f"v: {text}")["v"] == want
    if "e" in text.lower() and "." not in text or text == "1.0e6":
        assert yaml.safe_load(f"v: {text}")["v"] == text      # what PyYAML alone gives


@pytest.mark.parametrize("text", ["fast", "1e", "e6", "1.0e6.0", "0x10", " 1", "nan", "1_000"])
def test_not_numbers(text: str) -> None:
    assert values.as_number(text) is None
    assert values.as_number(True) is None


def test_strings_that_look_like_numbers_round_trip() -> None:
    doc = {"nodes": ["1e3", "x"], "v": 1e-6}
    assert files.parse_yaml(files.dump_yaml(doc)) == doc
    # only a whole scalar is a number: a content id starting "19e1..." stays a string
    assert files.parse_yaml("id: 19e1f497c1589a9b\nx: 1e3x\n") == {"id": "19e1f497c1589a9b",
                                                                   "x": "1e3x"}


def test_readme_scenario_example_and_every_number_field(tmp_path: Path) -> None:
    # the README's own example (its capacity_bps: 1.0e6 was refused as "must be a number")
    text = (ROOT / "README.md").read_text()
    block = text[text.index("```yaml\nscenario:") + len("```yaml\n"):]
    block = block[:block.index("```")]
    p = tmp_path / "readme-scenario.yaml"
    p.write_text(block)
    sc = scenario.load(str(p))
    assert [c.capacity_bps for c in sc.links if c.action == "capacity"] == [1e6]
    # a topology, a config file and --set take the same spellings
    t = tmp_path / "t.yaml"
    t.write_text("topology:\n  defaults: {capacity_bps: 1e7, buffer_pkts: 2.0e1}\n"
                 "  nodes: [a, b]\n  links:\n    - {between: [a, b], delay_s: 1e-3}\n")
    topo = topofiles.load(str(t))
    assert topo.capacity_bps.tolist() == [1e7, 1e7] and topo.delay_s.tolist() == [1e-3, 1e-3]
    assert topo.buffer_pkts.tolist() == [20, 20]
    c = tmp_path / "c.yaml"
    c.write_text("guards:\n  rate:\n    burst_rows: 2e6\nengine:\n  ceiling_s: 1E1\n")
    cfg = config.load(str(c), ["topology.default_capacity_bps=1.0e6"])
    assert cfg["guards.rate.burst_rows"] == 2e6 and cfg["engine.ceiling_s"] == 10.0
    assert cfg["topology.default_capacity_bps"] == 1e6


# ---- unreadable inputs -----------------------------------------------------------------------
def test_unreadable_inputs_name_the_file(tmp_path: Path) -> None:
    binary = tmp_path / "blob.yaml"
    binary.write_bytes(bytes(range(256)))
    latin = tmp_path / "latin.yaml"
    latin.write_bytes(b"name: caf\xe9\n")
    with pytest.raises(InputError, match="is a binary file"):
        files.read_yaml(str(binary))
    with pytest.raises(InputError, match=r"is not a UTF-8 text YAML file \(byte 0xe9 at offset 9\)"):
        files.read_yaml(str(latin))
    with pytest.raises(InputError, match="is a directory, not a YAML file"):
        files.read_yaml(str(tmp_path))
    with pytest.raises(InputError, match="is a directory"):
        topofiles.load(str(tmp_path) + "/")
    d = tmp_path / "g.graphml"
    d.mkdir()
    with pytest.raises(InputError, match="is a directory, not a topology file"):
        topofiles.load(str(d))
    with pytest.raises(InputError, match="is a directory, not a GraphML file"):
        topofiles.load_graphml(str(d))


def test_validate_refuses_binary_files_directories_and_empty_files(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    binary = tmp_path / "blob.yaml"
    binary.write_bytes(b"\x00\x01\x02binary")
    empty = tmp_path / "empty.yaml"
    empty.write_text("# nothing\n")
    rc = cli.main(["validate", str(binary), str(tmp_path), str(empty)])
    out = capsys.readouterr().out
    assert rc == 1
    assert f"  {binary}: '{binary}' is a binary file, not a YAML file (it holds NUL bytes)" in out
    assert f"  {tmp_path}: '{tmp_path}' is a directory, not a YAML file" in out
    assert f"  {empty}: is empty: not a config, topology or scenario" in out
    assert "OK" not in out


# ---- output paths ------------------------------------------------------------------------------
def test_output_checks(tmp_path: Path) -> None:
    f = tmp_path / "file"
    f.write_text("x")
    assert files.output_dir(str(tmp_path / "new" / "deeper")) == str(tmp_path / "new" / "deeper")
    assert not (tmp_path / "new").exists()                    # nothing created that stays
    assert os.listdir(tmp_path) == ["file"]
    with pytest.raises(InputError, match="--out: .* is an existing file, not a directory"):
        files.output_dir(str(f))
    with pytest.raises(InputError, match="cannot be created: .*file is not a directory"):
        files.output_dir(str(f / "sub"))
    with pytest.raises(InputError, match="is not writable"):
        files.output_dir("/proc/routerd-out")                 # root cannot write there either
    with pytest.raises(InputError, match="--export-link-trace: .* is a directory, not a file"):
        files.output_file(str(tmp_path), "--export-link-trace")
    assert files.output_file(str(f), "--x") == str(f)


@pytest.mark.parametrize("argv", [
    ["simulate", "--policy", "shortest", "--rate", "10", "--duration", "0.2", "--seed", "1",
     "--quiet"],
    ["sweep", "--rates", "10", "--policies", "shortest", "--duration", "0.2"],
    ["demo", "--duration", "2"],
])
def test_commands_refuse_an_unusable_out_before_the_work(
        argv: list[str], tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = tmp_path / "results"
    f.write_text("not a directory")
    assert cli.main([*argv, "--out", str(f)]) == 2
    err = capsys.readouterr().err
    assert f"--out: '{f}' is an existing file, not a directory" in err, err
    assert "Traceback" not in err
    # an unwritable place: refused before the run, not after it
    assert cli.main([*argv, "--out", "/proc/routerd-out"]) == 2
    err = capsys.readouterr().err
    assert "--out: '/proc/routerd-out' is not writable" in err, err


def test_replay_refuses_an_unusable_out_and_link_trace(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    f = tmp_path / "results"
    f.write_text("x")
    (tmp_path / "state").mkdir()
    assert cli.main(["replay", str(tmp_path / "state"), "--out", str(f)]) == 2
    assert f"--out: '{f}' is an existing file, not a directory" in capsys.readouterr().err
    assert cli.main(["replay", str(tmp_path / "state"), "--out", str(tmp_path / "o"),
                     "--export-link-trace", str(tmp_path)]) == 2
    assert "--export-link-trace: " in capsys.readouterr().err


# ---- endpoints and addresses ------------------------------------------------------------------
@pytest.mark.parametrize("key,value,why", [
    ("service.ingest", "not-an-endpoint", "is not an endpoint (tcp://HOST:PORT"),
    ("service.publish", "tcp://127.0.0.1:99999", "has no valid port"),
    ("service.control", "tcp://:7303", "is not tcp://HOST:PORT"),
    ("service.pull", "ipc://" + "x" * 120, "longer than 107 bytes"),
    ("service.metrics", "127.0.0.1:99999", "is not HOST:PORT"),
    ("agent.local", "localhost", "is not HOST:PORT"),
    ("security.control_readonly", "udp://1.2.3.4:5", "is not an endpoint"),
])
def test_bad_endpoints_are_refused_by_the_schema(key: str, value: str, why: str) -> None:
    with pytest.raises(config.ConfigError, match="is not|has") as ei:
        config.load(None, [f"{key}={value}"])
    assert why in str(ei.value) and key in str(ei.value)


@pytest.mark.parametrize("ep", ["tcp://127.0.0.1:7301", "tcp://*:7301", "tcp://127.0.0.1:*",
                                "tcp://[::1]:7301", "tcp://eth0:7301", "ipc:///tmp/rd-x",
                                "inproc://x", "tcp://127.0.0.1:0"])
def test_good_endpoints(ep: str) -> None:
    assert values.endpoint_problem(ep) is None


def test_serve_refuses_a_malformed_endpoint_without_calling_it_exposed(
        tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rc = cli.main(["serve", "--ingest", "not-an-endpoint", "--state-dir", str(tmp_path / "s")])
    err = capsys.readouterr().err
    assert rc == 2
    assert "service.ingest: 'not-an-endpoint' is not an endpoint" in err
    assert "reachable" not in err and not (tmp_path / "s").exists()


def test_simulate_names_a_directory_given_as_a_file(tmp_path: Path,
                                                    capsys: pytest.CaptureFixture[str]) -> None:
    base = ["simulate", "--policy", "shortest", "--duration", "0.2", "--seed", "1", "--quiet",
            "--out", str(tmp_path / "o")]
    for extra in (["--traffic", str(tmp_path)], ["--rate", "1", "--scenario", str(tmp_path)],
                  ["--rate", "1", "--config", str(tmp_path)],
                  ["--rate", "1", "--topology", str(tmp_path)]):
        assert cli.main([*base, *extra]) == 2, extra
        err = capsys.readouterr().err
        assert str(tmp_path) in err and "directory" in err.lower(), err


def test_invalid_yaml_is_named_with_its_line_and_column(tmp_path: Any) -> None:
    from routerd.core.errors import InputError
    from routerd.io.files import read_yaml

    p = tmp_path / "bad.yaml"
    p.write_text("engine:\n  mode: split\n  step: a: b\n")
    with pytest.raises(InputError) as ei:
        read_yaml(str(p))
    assert str(ei.value) == (f"{p}: is not valid YAML: mapping values are not allowed in "
                             "this context, at line 3, column 10")


def test_a_key_given_twice_in_one_mapping_is_refused_with_its_lines(tmp_path: Path) -> None:
    # YAML 1.2 (yaml.org/spec/1.2.2, 3.2.1.1: "the keys of a mapping must be unique"); PyYAML
    # kept the last one, so a second "links:" dropped every link of the first in silence
    p = tmp_path / "t.yaml"
    p.write_text("topology:\n  nodes: [a, b]\n  links:\n    - {between: [a, b], delay_s: 0.001}\n"
                 "  links:\n    - {between: [b, a], delay_s: 0.002}\n")
    with pytest.raises(InputError, match=r"found the key 'links' twice \(first at line 3\).*"
                                         r"at line 5, column 3"):
        files.read_yaml(str(p))
    # a merge key's values may still be overridden: that is what merging is for
    assert files.parse_yaml("b: &b {x: 1, y: 2}\no:\n  <<: *b\n  x: 3\n")["o"] == {"x": 3, "y": 2}
