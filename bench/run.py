"""Run every benchmark module ``bench/bench_*.py`` and write one JSON object of figures.

Usage: ``python bench/run.py [--quick] [--json FILE] [--only NAME ...]``

Each module exposes ``run(quick: bool) -> dict[str, dict]``: named figures, each at least
``{"value": float, "unit": str, "ratio": float, "against": str}`` — the ratio is to a floor
or ceiling measured *in the same run* on the same machine, so figures from different
machines compare by their ratios.  A module that fails is recorded under
``_errors`` (module → traceback's last line) and the others still run; the exit code is 1
if any module failed.  Figure names must be unique across modules (a clash is an error).
"""
from __future__ import annotations

import argparse
import glob
import importlib
import json
import math
import os
import platform
import sys
import time
import traceback
from typing import Any

HERE = os.path.dirname(os.path.abspath(__file__))
REQUIRED = ("value", "unit", "ratio", "against")


def discover(only: list[str] | None = None) -> list[str]:
    paths = sorted(glob.glob(os.path.join(HERE, "bench_*.py")))
    if only:
        paths = [p for p in paths if any(o in os.path.basename(p) for o in only)]
    return paths


def load_module(path: str) -> Any:
    """Import ``bench/NAME.py`` as top-level module NAME (bench/ on sys.path), so worker
    processes a benchmark starts can import it again by name (pickling by reference)."""
    d = os.path.dirname(os.path.abspath(path))
    if d not in sys.path:
        sys.path.insert(0, d)
    name = os.path.splitext(os.path.basename(path))[0]
    return importlib.import_module(name)


def check_figures(mod: str, figs: Any) -> list[str]:
    """Problems with a module's return value (empty when it is well formed)."""
    if not isinstance(figs, dict):
        return [f"{mod}: run() returned {type(figs).__name__}, not a dict of figures"]
    bad = []
    for k, f in figs.items():
        if not isinstance(f, dict) or any(r not in f for r in REQUIRED):
            bad.append(f"{mod}: figure {k!r} lacks one of {', '.join(REQUIRED)}")
            continue
        for r in ("value", "ratio"):
            if not isinstance(f[r], (int, float)) or not math.isfinite(float(f[r])):
                bad.append(f"{mod}: figure {k!r} has a non-finite {r}: {f[r]!r}")
    return bad


def run_all(quick: bool, only: list[str] | None = None) -> dict[str, Any]:
    sys.path.insert(0, os.path.dirname(HERE))  # the repo root, for `import routerd`
    out: dict[str, Any] = {}
    errors: dict[str, str] = {}
    timing: dict[str, float] = {}
    for path in discover(only):
        mod = os.path.splitext(os.path.basename(path))[0]
        t0 = time.perf_counter()
        try:
            figs = load_module(path).run(quick)
            bad = check_figures(mod, figs)
            if bad:
                raise ValueError("; ".join(bad))
            clash = sorted(set(figs) & set(out))
            if clash:
                raise ValueError(f"figure names already used by another module: {clash}")
            for f in figs.values():
                f.setdefault("module", mod)
            out.update(figs)
        except Exception as e:  # a failing module is recorded, the rest still run
            tb = traceback.format_exc()
            errors[mod] = f"{type(e).__name__}: {e}"
            print(f"[{mod}] FAILED\n{tb}", file=sys.stderr)
        timing[mod] = round(time.perf_counter() - t0, 3)
    out["_meta"] = {
        "quick": quick,
        "python": platform.python_version(),
        "machine": platform.machine(),
        "cpus": os.cpu_count(),
        "seconds": timing,
        "when_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }
    if errors:
        out["_errors"] = errors
    return out


def table(res: dict[str, Any]) -> str:
    rows = [(k, f) for k, f in res.items() if not k.startswith("_")]
    w = max([len(k) for k, _ in rows] + [6])
    lines = [f"{'figure'.ljust(w)}  {'value':>14}  {'unit':<10} {'ratio':>8}  against"]
    for k, f in rows:
        v = float(f["value"])
        vs = f"{v:14.4g}" if abs(v) < 1e6 else f"{v:14.4e}"
        lines.append(f"{k.ljust(w)}  {vs}  {f['unit']!s:<10} {float(f['ratio']):8.3f}  {f['against']}")
    for mod, err in res.get("_errors", {}).items():
        lines.append(f"{mod}: FAILED: {err}")
    secs = res.get("_meta", {}).get("seconds", {})
    if secs:
        lines.append("seconds: " + ", ".join(f"{m} {s:.1f}" for m, s in secs.items())
                     + f" (total {sum(secs.values()):.1f})")
    return "\n".join(lines)


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--quick", action="store_true", help="short runs (the whole set in under a minute)")
    p.add_argument("--json", metavar="FILE", help="write all figures as one JSON object to FILE")
    p.add_argument("--only", nargs="*", metavar="NAME", help="run only modules whose file name contains NAME")
    a = p.parse_args(argv)
    res = run_all(a.quick, a.only)
    print(table(res))
    if a.json:
        d = os.path.dirname(a.json)
        if d:
            os.makedirs(d, exist_ok=True)
        with open(a.json, "w", encoding="utf-8") as fh:
            json.dump(res, fh, indent=2, sort_keys=True)
            fh.write("\n")
        print(f"wrote {a.json}")
    return 1 if res.get("_errors") else 0


if __name__ == "__main__":
    sys.exit(main())
