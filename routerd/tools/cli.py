"""The ``routerd`` command line: one entry point, subcommands from the shells.

Owns: argument parsing and dispatch only.  Each subcommand lives in the module that owns
its job; this table names them.  A command module provides ``configure(parser)`` and
``run(args) -> int`` (exit code).  :func:`main` imports the module of the command chosen
and no other: ``routerd --version`` and ``routerd --help`` (its list comes from
:data:`COMMANDS`) load nothing of routerd beyond this module and its packages, and
``routerd COMMAND [--help]`` loads that command's module.  Heavy imports (matplotlib,
zmq) stay inside ``run``.

Must not import: any command module at import time (only through :data:`COMMANDS`).
"""
from __future__ import annotations

import argparse
import importlib
import importlib.util
import os
import sys
from collections.abc import Collection, Sequence

from routerd import __version__

# name → (module, one-line help).  Order is the order of `routerd --help`.
COMMANDS: dict[str, tuple[str, str]] = {
    "validate": ("routerd.tools.validate", "check config, topology or scenario files and report every error"),
    "simulate": ("routerd.sim.commands_simulate", "run the packet-level simulator on a topology with one policy"),
    "sweep": ("routerd.sim.commands_sweep", "simulate rates x policies x seeds and draw delivery time against load"),
    "serve": ("routerd.service.serve", "run the routing policy service (observations in, tables out, metrics)"),
    "keys": ("routerd.io.security", "write a CURVE key pair (NAME.key, NAME.key_secret) for the service or a reporter"),
    "demo": ("routerd.tools.demo", "see routerd work in under a minute: a live service driven by the simulator, compared with static routes"),
    "replay": ("routerd.tools.replay", "re-run a service journal offline: reproduce its tables or compare other settings"),
    "agent": ("routerd.agent.forwarder", "run the forwarding agent of one overlay node (UDP, tables from the service, probes)"),
    "lab": ("routerd.tools.lab", "build an emulated lab on this host (namespaces, veth, tbf), run service and agents, offer traffic"),
}


def _available() -> dict[str, tuple[str, str]]:
    """The commands whose subpackage is installed.  Only the subpackage is looked up (its
    parent, ``routerd``, is loaded already), so listing the commands imports nothing."""
    # ``importlib.util`` is a submodule: it must be imported by name (above).  An editable
    # install's import hook happens to import it first, which hid this from the tests once.
    out = {}
    for name, (mod, helptext) in COMMANDS.items():
        try:
            spec = importlib.util.find_spec(mod.rpartition(".")[0])
        except ModuleNotFoundError:   # its parent package is not installed
            continue
        if spec is not None:
            out[name] = (mod, helptext)
    return out


def chosen_command(argv: Sequence[str]) -> str | None:
    """The command named on a command line, if any: the first word that is not an option
    (the top level takes no option with a value)."""
    return next((a for a in argv if not a.startswith("-")), None)


def build_parser(configured: Collection[str] | None = None) -> argparse.ArgumentParser:
    """The ``routerd`` parser.  ``configured``: the commands whose module is imported and
    whose flags are added (default: every command, for tools and tests that inspect them);
    the others are listed with their help line from :data:`COMMANDS` only."""
    p = argparse.ArgumentParser(
        prog="routerd",
        description="Adaptive next-hop tables for test-lab overlay networks, learned online from "
                    "measured hop latency (Q-routing), with a packet-level simulator to validate "
                    "settings offline first.",
    )
    p.add_argument("--version", action="version", version=f"routerd {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")
    for name, (mod, helptext) in _available().items():
        sp = sub.add_parser(name, help=helptext, description=helptext)
        if configured is None or name in configured:
            m = importlib.import_module(mod)
            m.configure(sp)
            sp.set_defaults(_run=m.run)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    name = chosen_command(argv)
    parser = build_parser(configured=() if name is None else (name,))
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 2
    try:
        return int(args._run(args) or 0)
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # output piped into `head` and the reader went away: not an error of ours
        try:
            sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - silence the flush at exit
        except OSError:
            pass
        return 0
