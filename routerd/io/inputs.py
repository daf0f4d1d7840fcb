"""The one input rule: how every command turns a config file, flags and ``--set`` into the
config it runs with, and the config into a topology.

Owns:

* **config-relative paths** — a path written in a config file (the keys ``SCHEMA`` marks
  ``form="path"``/``"key"``: ``topology.file``, ``service.state_dir``, the key and allow
  files, ``shard.map``, ``agent.underlay``, ...) is relative to the *folder of that config
  file*; a path given on the command line (a flag or ``--set``) is relative to the working
  directory; defaults stay as they are.  :func:`resolve_paths` makes them absolute once,
  at load time, so a config handed on (written out for a child, recorded in a state dir)
  means the same files wherever it is read.  ``topohub:`` references and Z85 key texts are
  not paths.
* **link defaults** — a link's capacity and buffer come from the link, else the topology
  file's ``defaults``, else :func:`link_defaults` of the config: ``topology.default_*``,
  which ``--capacity-bps`` / ``--buffer-pkts`` override like any ``--set``.
* :func:`load_config` (``args.config``, the command's flags, ``args.overrides`` from
  ``--set``) and :func:`load_topology` (the config's ``topology.file``, else the built-in
  demo lab): what ``serve``, shard workers, ``replay``, ``agent``, ``simulate``, ``sweep``,
  ``lab``, ``demo`` and ``validate`` all call.

Must not import: ``routerd.service``, ``routerd.agent``, ``routerd.sim``, ``routerd.tools``.
"""
from __future__ import annotations

import argparse
import os
from collections.abc import Iterable, Mapping
from importlib import resources
from typing import Any

from routerd.core.topology import LinkDefaults, Topology, from_mapping

from . import config as _config
from . import topofiles

#: serve's flags → the config keys they set (a flag beats the file).
FLAG_KEYS: Mapping[str, str] = {
    "ingest": "service.ingest", "pull": "service.pull", "publish": "service.publish",
    "control": "service.control", "metrics": "service.metrics",
    "state_dir": "service.state_dir", "server_key": "security.server_key",
    "allow": "security.allow", "control_readonly": "security.control_readonly",
    "topology": "topology.file", "capacity_bps": "topology.default_capacity_bps",
    "buffer_pkts": "topology.default_buffer_pkts"}

#: The packaged topology a command runs on when nothing names one.
DEMO_LAB = "demo-lab.yaml"


def is_path_value(key: str, value: Any) -> bool:
    """True when ``value`` of config key ``key`` names a file or folder (so it resolves)."""
    f = _config.SCHEMA.get(key)
    if f is None or f.form not in ("path", "key") or not isinstance(value, str) or not value:
        return False
    if key == "topology.file" and value.startswith("topohub:"):
        return False
    if f.form == "key":
        from .security import is_key_text

        return not is_key_text(value)
    return True


def resolve(key: str, value: Any, base: str) -> Any:
    """``value`` of ``key`` with a relative path made absolute against folder ``base``."""
    if is_path_value(key, value) and not os.path.isabs(value):
        return os.path.normpath(os.path.join(os.path.abspath(base), value))
    return value


def resolve_paths(cfg: _config.Config, base: str,
                  keys: Iterable[str] | None = None) -> _config.Config:
    """``cfg`` with every path key (or those of ``keys``) resolved against folder ``base``."""
    ov = {k: v2 for k in (keys if keys is not None else _config.SCHEMA)
          if (v2 := resolve(k, v := cfg[k], base)) != v}
    return cfg.with_overrides(ov, where=cfg.source) if ov else cfg


def config_file(path: str | Mapping[str, Any] | None, overrides: Iterable[str] = (),
                flags: Mapping[str, Any] | None = None,
                base: _config.Config | None = None) -> _config.Config:
    """The config file at ``path`` (else ``base``, a state dir's recorded config, else the
    defaults) with its paths resolved against its folder, then ``flags`` (config key →
    value; None: not given) and the ``--set KEY=VALUE`` items on top, both relative to the
    working directory."""
    if isinstance(path, Mapping):
        # a config carried inline (a sweep's spec on another host): its paths were made
        # absolute where it was read, so nothing here resolves against a folder
        cfg = _config.load(path)
        where = "<inline config>"
    elif path is not None:
        cfg = _config.load(path)      # only what the file sets resolves; defaults stay
        cfg = resolve_paths(cfg, os.path.dirname(os.path.abspath(path)), cfg.given)
        where = path
    else:
        cfg = base if base is not None else _config.load(None)
        where = "recorded config" if base is not None else "defaults"
    ov = {k: resolve(k, v, os.getcwd()) for k, v in (flags or {}).items() if v is not None}
    if ov:
        cfg = cfg.with_overrides(ov, where=f"{where} + command line")
    sets = {k: resolve(k, v, os.getcwd()) for k, v in _config.parse_overrides(overrides).items()}
    if sets:
        cfg = cfg.with_overrides(sets, where=f"{where} + --set")
    return cfg


def load_config(args: argparse.Namespace, base: _config.Config | None = None) -> _config.Config:
    """The config a command runs with: ``args.config`` (else ``base``, else the defaults),
    the flags of :data:`FLAG_KEYS` it has, then its ``--set`` items (``args.overrides``)."""
    flags = {key: getattr(args, attr, None) for attr, key in FLAG_KEYS.items()}
    return config_file(getattr(args, "config", None), getattr(args, "overrides", None) or (),
                       flags, base)


def link_defaults(cfg: _config.Config) -> LinkDefaults:
    """Capacity and buffer for links whose topology file gives none: the config's
    ``topology.default_capacity_bps`` / ``default_buffer_pkts`` (``--capacity-bps`` /
    ``--buffer-pkts`` are overrides of these)."""
    return LinkDefaults(cfg["topology.default_capacity_bps"], cfg["topology.default_buffer_pkts"])


def demo_lab(defaults: LinkDefaults = LinkDefaults()) -> Topology:
    """The packaged demo lab (routerd/data/demo-lab.yaml; its file gives every link's
    capacity and buffer, so ``defaults`` never apply to it)."""
    with resources.as_file(resources.files("routerd") / "data" / DEMO_LAB) as path:
        return topofiles.load(str(path), defaults)


def load_topology(cfg: _config.Config, spec: Any = None) -> Topology:
    """The topology ``cfg`` names (``topology.file``, resolved by :func:`load_config`), or
    ``spec`` when given (a path, ``topohub:GROUP/NAME``, a parsed document in our format or
    a :class:`Topology`), else the built-in demo lab; links without capacity or buffer take
    :func:`link_defaults`."""
    d = link_defaults(cfg)
    if isinstance(spec, Topology):
        return spec
    if isinstance(spec, Mapping):
        return from_mapping(spec, source="<spec>", defaults=d)
    if spec is None:
        spec = cfg["topology.file"]
    return topofiles.load(str(spec), d) if spec else demo_lab(d)
