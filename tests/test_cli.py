"""routerd.tools.cli: the entry point imports the module of the chosen command only.

``routerd --version`` and ``routerd --help`` must stay cheap (they loaded 30 modules once):
in a fresh interpreter only ``routerd``, ``routerd.tools`` and ``routerd.tools.cli`` of
ours may be imported; ``routerd COMMAND --help`` adds that command's module and no other
command's."""
from __future__ import annotations

import importlib
import re
import subprocess
import sys
from typing import Any

import pytest

from routerd.tools import cli

ENTRY = {"routerd", "routerd.tools", "routerd.tools.cli"}


# runs the entry point as ``python -m routerd`` does, then lists what got imported
# (-X importtime would miss importlib.import_module, which bypasses its hook)
_PROBE = """
import runpy, sys
sys.argv = ["routerd", *sys.argv[1:]]
try:
    runpy.run_module("routerd", run_name="__main__", alter_sys=True)
except SystemExit as e:
    code = e.code
print("MODULES", *sorted(m for m in sys.modules if m == "routerd" or m.startswith("routerd.")),
      file=sys.stderr)
sys.exit(code)
"""


def _routerd_modules(args: list[str], cwd: Any) -> tuple[set[str], str]:
    """Every routerd module a fresh ``python -m routerd ARGS`` has imported when it
    exits, and its stdout."""
    r = subprocess.run([sys.executable, "-c", _PROBE, *args], capture_output=True, text=True,
                       timeout=120, cwd=cwd)
    assert r.returncode == 0, r.stderr[-2000:]
    line = next(x for x in r.stderr.splitlines() if x.startswith("MODULES"))
    return set(line.split()[1:]) - {"routerd.__main__"}, r.stdout


@pytest.mark.slow
def test_version_and_help_import_only_the_entry_point(tmp_path: Any) -> None:
    mods, out = _routerd_modules(["--version"], tmp_path)
    assert mods == ENTRY
    assert out.startswith("routerd ")
    mods, out = _routerd_modules(["--help"], tmp_path)
    assert mods == ENTRY
    for name, (_mod, helptext) in cli.COMMANDS.items():   # the list comes from the table
        assert re.search(rf"^\s+{name}\s", out, flags=re.M), name
        assert helptext.split()[0] in out


@pytest.mark.slow
def test_command_help_imports_that_command_only(tmp_path: Any) -> None:
    mods, out = _routerd_modules(["validate", "--help"], tmp_path)
    assert "routerd.tools.validate" in mods
    others = {m for n, (m, _h) in cli.COMMANDS.items() if n != "validate"}
    assert not mods & others, sorted(mods & others)
    assert "usage: routerd validate" in out


def _imports_during(monkeypatch: pytest.MonkeyPatch, argv: list[str]) -> tuple[list[str], Any]:
    seen: list[str] = []
    real = importlib.import_module

    def spy(name: str, package: str | None = None) -> Any:
        seen.append(name)
        return real(name, package)

    monkeypatch.setattr(cli.importlib, "import_module", spy)
    with pytest.raises(SystemExit) as e:
        cli.main(argv)
    return seen, e.value.code


def test_main_builds_the_chosen_command_only(monkeypatch: pytest.MonkeyPatch,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    assert _imports_during(monkeypatch, ["--version"]) == ([], 0)
    assert _imports_during(monkeypatch, ["--help"]) == ([], 0)
    assert _imports_during(monkeypatch, ["replay", "--help"]) == (["routerd.tools.replay"], 0)
    # an unknown command is refused by argparse with the table's names, nothing imported
    seen, code = _imports_during(monkeypatch, ["fly"])
    assert (seen, code) == ([], 2)
    assert "invalid choice: 'fly'" in capsys.readouterr().err


def test_chosen_command_is_the_first_word() -> None:
    assert cli.chosen_command(["--version"]) is None
    assert cli.chosen_command(["-h", "serve", "--shards", "2"]) == "serve"
    assert cli.chosen_command([]) is None


def test_the_whole_parser_still_knows_every_flag() -> None:
    # tools and tests that inspect flags build everything (as before)
    args = cli.build_parser().parse_args(["serve", "--shards", "2", "--state-dir", "x"])
    assert args.shards == 2 and args._run is not None
