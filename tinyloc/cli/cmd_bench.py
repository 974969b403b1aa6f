"""``tinyloc bench <stage>``: speed figures measured against a baseline in the same run."""

from __future__ import annotations

import argparse
import importlib
import json
import pkgutil

NAME = "bench"
HELP = "measure a stage's speed against a baseline in the same run"
DESCRIPTION = """\
Measure one stage's speed and memory, always against a baseline measured in the same
run (so the ratio means something on a busy machine). Figures are medians.
Use --json for one JSON object on stdout."""


def _stages():
    pkg = importlib.import_module("tinyloc.bench")
    out = []
    for info in pkgutil.iter_modules(pkg.__path__):
        if not info.name.startswith("_"):
            out.append(importlib.import_module(f"tinyloc.bench.{info.name}"))
    return sorted(out, key=lambda m: m.NAME)


def register(parser):
    from .main import group

    sub = group(parser, "stage")
    for mod in _stages():
        p = sub.add_parser(mod.NAME, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP),
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        p.add_argument("--json", action="store_true", help="print one JSON object instead of a table")
        if hasattr(mod, "add_arguments"):
            mod.add_arguments(p)
        p.set_defaults(func=lambda a, m=mod: _run(m, a))


def _fmt(v):
    if isinstance(v, float):
        return f"{v:.3g}" if abs(v) < 1000 else f"{v:.0f}"
    return str(v)


def _run(mod, args) -> int:
    res = mod.run(args)
    if args.json:
        print(json.dumps(res, sort_keys=True))
    else:
        width = max(len(k) for k in res)
        for k, v in res.items():
            print(f"{k:<{width}}  {_fmt(v)}")
    return 0
