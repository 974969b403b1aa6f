"""Reading TOML (stdlib ``tomllib``) with one-line errors, and writing the small flat TOML files we emit."""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

from .errors import InputError


def read_toml(path, *, cls: type[InputError] = InputError) -> dict:
    """Parse a TOML file; raise ``cls`` with the file name and the parser's reason on failure."""
    p = Path(path)
    try:
        data = p.read_bytes()
    except OSError as e:
        raise cls(f"{p}: cannot read ({e.strerror or e})") from None
    try:
        return tomllib.loads(data.decode("utf-8"))
    except UnicodeDecodeError:
        raise cls(f"{p}: not UTF-8 text") from None
    except tomllib.TOMLDecodeError as e:
        raise cls(f"{p}: TOML syntax error: {e}") from None


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if not math.isfinite(v):
            raise ValueError("TOML output: non-finite float")
        return repr(v)
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    raise TypeError(f"TOML output: unsupported value {v!r}")


def dumps_toml(doc: dict, header: str = "") -> str:
    """Serialise a dict of scalars, lists and one level of tables to TOML text."""
    lines = [f"# {ln}" for ln in header.splitlines()] if header else []
    for k, v in doc.items():
        if not isinstance(v, dict):
            lines.append(f"{k} = {_value(v)}")
    for k, v in doc.items():
        if isinstance(v, dict):
            lines.append("")
            lines.append(f"[{k}]")
            for k2, v2 in v.items():
                if isinstance(v2, dict):
                    raise TypeError("TOML output: nested tables deeper than one level")
                lines.append(f"{k2} = {_value(v2)}")
    return "\n".join(lines) + "\n"


def write_toml(path, doc: dict, header: str = "") -> None:
    """Write ``doc`` as TOML to ``path`` (atomically: temp file then rename)."""
    p = Path(path)
    tmp = p.with_name(p.name + ".tmp")
    tmp.write_text(dumps_toml(doc, header), encoding="utf-8")
    tmp.replace(p)
