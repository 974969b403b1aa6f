"""Entry point of the ``tinyloc`` command: discovers command modules, dispatches, turns errors into one line."""

from __future__ import annotations

import argparse
import importlib
import os
import pkgutil
import re
import sys

from .. import __version__
from ..errors import TinylocError

# Commands in the order ``--help`` lists them; modules found but not listed come after.
ORDER = ["demo", "run", "locate", "look", "map", "sim", "calibrate", "link", "replay", "import", "export", "bench"]

EPILOG = """\
typical session:
  tinyloc demo                                   run the bundled demo site through the live loop
  tinyloc map pack site.geojson -o site.tlm      compile open vector map data into a packed map
  tinyloc calibrate intrinsics shots/*.png --board 9x6 --square 0.025 -o camera.toml
  tinyloc replay RUN --map site.tlm -o report/   measure a recorded drive against ground truth
each command has its own --help.
"""


def _command_modules():
    pkg = importlib.import_module("tinyloc.cli")
    mods = []
    for info in pkgutil.iter_modules(pkg.__path__):
        if info.name.startswith("cmd_"):
            mods.append(importlib.import_module(f"tinyloc.cli.{info.name}"))
    rank = {n: i for i, n in enumerate(ORDER)}
    return sorted(mods, key=lambda m: (rank.get(m.NAME, len(ORDER)), m.NAME))


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser (all command groups)."""
    parser = argparse.ArgumentParser(
        prog="tinyloc",
        description="Global pose (east, north, heading) for small outdoor robots from one camera, "
                    "gravity and wheel odometry, matched against a 2D vector map of the site.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"tinyloc {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for mod in _command_modules():
        p = sub.add_parser(mod.NAME, help=mod.HELP, description=getattr(mod, "DESCRIPTION", mod.HELP),
                           formatter_class=argparse.RawDescriptionHelpFormatter)
        mod.register(p)
    return parser


# Options whose value is a comma-separated list of numbers that may start with a minus sign
# (a southern latitude, a western longitude, a gravity component).
_SIGNED_LIST_OPTIONS = frozenset({"--near", "--at", "--center", "--origin", "--gravity"})
_NEGATIVE_LIST = re.compile(r"^-[0-9.]")


def join_signed_values(argv: list[str]) -> list[str]:
    """Turn ``--near -34.5,-166.9`` into ``--near=-34.5,-166.9``.

    argparse takes a value starting with '-' for an option unless it looks like one plain negative
    number, so coordinate lists in the southern or western hemisphere would need ``=``.
    """
    out: list[str] = []
    i = 0
    while i < len(argv):
        a = argv[i]
        if a in _SIGNED_LIST_OPTIONS and i + 1 < len(argv) and _NEGATIVE_LIST.match(argv[i + 1]):
            out.append(f"{a}={argv[i + 1]}")
            i += 2
            continue
        out.append(a)
        i += 1
    return out


def main(argv: list[str] | None = None) -> int:
    """Run the CLI; returns the process exit status (0 ok, 1 job failed, 2 bad input)."""
    parser = build_parser()
    args = parser.parse_args(join_signed_values(sys.argv[1:] if argv is None else list(argv)))
    func = getattr(args, "func", None)
    if func is None:
        # A group given without its sub-command: show that group's help.
        (getattr(args, "_group_parser", None) or parser).print_help()
        return 2
    try:
        rc = func(args)
        return int(rc or 0)
    except TinylocError as e:
        print(f"tinyloc: error: {e}", file=sys.stderr)
        return 2
    except FileNotFoundError as e:
        print(f"tinyloc: error: {e.filename}: no such file or directory", file=sys.stderr)
        return 2
    except IsADirectoryError as e:
        print(f"tinyloc: error: {e.filename}: is a directory", file=sys.stderr)
        return 2
    except PermissionError as e:
        print(f"tinyloc: error: {e.filename}: permission denied", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("tinyloc: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # Output consumer went away (e.g. piped into head): exit quietly.
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 0


def group(parser: argparse.ArgumentParser, dest: str):
    """Make ``parser`` a group of sub-commands; returns the sub-parsers action.

    Running the group without a sub-command prints the group's help.
    """
    parser.set_defaults(func=None, _group_parser=parser)
    return parser.add_subparsers(dest=dest, metavar="SUBCOMMAND")


if __name__ == "__main__":
    sys.exit(main())
