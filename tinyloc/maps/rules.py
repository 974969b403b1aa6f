"""Class rules: which feature properties make which map class, and how wide or large it is drawn.

A rules file is TOML::

    format = "tinyloc-map-rules"
    version = 1

    [[rule]]                      # rules are tried in file order; the first match wins
    when = ["highway=footway|path", "area!=yes"]   # every condition must hold
    class = "sidewalk"
    geometry = "line"             # optional: only for "point", "line" or "area" parts
    width_m = 2.0                 # optional: stroke width of lines (m)

Conditions: ``key=pattern`` (the property exists and its text matches),
``key!=pattern`` (it does not exist or does not match), ``!key`` (it does not
exist). Patterns use ``*`` (any text) and ``?`` (one character); ``a|b`` lists
alternatives. Actions: ``class = NAME``, ``class_from = KEY`` (the property's
value names the class), or ``ignore = true`` (deliberately not drawn; counted
apart from unmapped features). Sizes: ``width_m``, ``width_from`` (a property
holding a width in metres, e.g. ``"width"``), ``lanes_from`` with
``lane_width_m`` (width = lane count x lane width), ``radius_m`` for points.
Precedence: width property, then lanes, then ``width_m``, then the class table.
"""

from __future__ import annotations

from dataclasses import dataclass
import fnmatch
from importlib import resources
import re

from ..classes import MAP_CLASSES
from ..errors import RulesError
from ..tomlio import read_toml

FORMAT = "tinyloc-map-rules"
VERSION = 1
KINDS = ("point", "line", "area")
MAX_SIZE_M = 200.0  # widths or radii above this are treated as typos and ignored
_MAP_NAMES = {c.name: c.index for c in MAP_CLASSES}
_NUM = re.compile(r"^\s*([0-9]+(?:\.[0-9]*)?|\.[0-9]+)\s*(m|meters|metres)?\s*$")


@dataclass(frozen=True)
class Condition:
    """One ``key=pattern`` / ``key!=pattern`` / ``!key`` test."""

    key: str
    patterns: tuple  # empty for a pure presence/absence test
    negate: bool

    def holds(self, props: dict) -> bool:
        v = props.get(self.key)
        if v is None:
            return self.negate
        if not self.patterns:
            return not self.negate
        text = _text(v)
        hit = any(fnmatch.fnmatchcase(text, p) for p in self.patterns)
        return hit != self.negate


@dataclass(frozen=True)
class Rule:
    """One rule of a rules file (see the module docstring)."""

    number: int
    when: tuple
    class_index: int | None
    class_from: str | None
    ignore: bool
    geometry: tuple
    width_m: float | None
    width_from: str | None
    lanes_from: str | None
    lane_width_m: float | None
    radius_m: float | None
    needs: tuple = ()  # keys that must be present for the rule to match (a fast pre-check)


@dataclass(frozen=True)
class Match:
    """What a feature part becomes: class index and its line width / point radius (m)."""

    class_index: int
    width_m: float
    radius_m: float
    rule: int


IGNORED = "ignored"


class Rules:
    """An ordered list of rules; :meth:`match` finds the first that applies."""

    def __init__(self, rules, source: str):
        self.rules = tuple(rules)
        self.source = source

    def __repr__(self):
        return f"Rules({self.source!r}, {len(self.rules)} rules)"

    def match(self, props: dict, kind: str):
        """Match the properties of a feature part of geometry ``kind``.

        Returns
        -------
        Match, ``IGNORED`` or None
            None when no rule applies (the part is unmapped), or when a
            ``class_from`` property names no map class.
        """
        for r in self.rules:
            if r.geometry and kind not in r.geometry:
                continue
            if any(k not in props for k in r.needs):
                continue
            if not all(c.holds(props) for c in r.when):
                continue
            if r.ignore:
                return IGNORED
            ci = r.class_index
            if r.class_from is not None:
                ci = _MAP_NAMES.get(_text(props.get(r.class_from, "")).strip().lower())
                if ci is None:
                    return None
            info = MAP_CLASSES[ci]
            return Match(ci, self._width(r, props, info.width_m), r.radius_m or info.radius_m, r.number)
        return None

    @staticmethod
    def _width(r: Rule, props: dict, default: float) -> float:
        if r.width_from is not None:
            w = parse_metres(props.get(r.width_from))
            if w is not None:
                return w
        if r.lanes_from is not None and r.lane_width_m:
            n = parse_metres(props.get(r.lanes_from))
            if n is not None and n >= 1:
                return min(n * r.lane_width_m, MAX_SIZE_M)
        return r.width_m if r.width_m is not None else default


def _text(v) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    return v if isinstance(v, str) else str(v)


def parse_metres(v):
    """A positive size in metres from a property value (``7``, ``"7.5"``, ``"3 m"``), else None."""
    if v is None or isinstance(v, bool):
        return None
    if isinstance(v, (int, float)):
        x = float(v)
    else:
        m = _NUM.match(str(v).split(";")[0])
        if not m:
            return None
        x = float(m.group(1))
    return x if 0.0 < x <= MAX_SIZE_M else None


def _condition(where: str, text) -> Condition:
    if not isinstance(text, str) or not text.strip():
        raise RulesError(f"{where}: each condition must be a non-empty string like \"key=value\"")
    t = text.strip()
    if t.startswith("!") and "=" not in t:
        return Condition(t[1:].strip(), (), True)
    if "!=" in t:
        k, _, pat = t.partition("!=")
        neg = True
    elif "=" in t:
        k, _, pat = t.partition("=")
        neg = False
    else:
        raise RulesError(f"{where}: condition {text!r} must be \"key=pattern\", \"key!=pattern\" or \"!key\"")
    k = k.strip()
    if not k:
        raise RulesError(f"{where}: condition {text!r} has no key")
    pats = tuple(p.strip() for p in pat.split("|"))
    if any(not p for p in pats):
        raise RulesError(f"{where}: condition {text!r} has an empty pattern (use \"{k}=*\" for any value)")
    if pats == ("*",):
        pats = ()
    return Condition(k, pats, neg)


def _size(where: str, d: dict, key: str):
    v = d.get(key)
    if v is None:
        return None
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not 0.0 < float(v) <= MAX_SIZE_M:
        raise RulesError(f"{where}: {key} must be a number in (0, {MAX_SIZE_M:g}] metres, got {v!r}")
    return float(v)


_KEYS = {"when", "class", "class_from", "ignore", "geometry", "width_m", "width_from", "lanes_from",
         "lane_width_m", "radius_m", "note"}


def parse_rules(doc: dict, source: str = "<rules>") -> Rules:
    """Build :class:`Rules` from a parsed TOML document (see the module docstring for the grammar)."""
    if doc.get("format") != FORMAT:
        raise RulesError(f"{source}: not a rules file (expected format = \"{FORMAT}\")")
    ver = doc.get("version")
    if not isinstance(ver, int) or isinstance(ver, bool):
        raise RulesError(f"{source}: version must be an integer")
    if ver > VERSION:
        raise RulesError(f"{source}: rules version {ver} is newer than this tinyloc supports ({VERSION})")
    raw = doc.get("rule")
    if not isinstance(raw, list) or not raw:
        raise RulesError(f"{source}: no [[rule]] tables")
    out = []
    for n, d in enumerate(raw, start=1):
        where = f"{source}: rule {n}"
        if not isinstance(d, dict):
            raise RulesError(f"{where}: must be a table")
        extra = sorted(set(d) - _KEYS)
        if extra:
            raise RulesError(f"{where}: unknown key {extra[0]!r} (allowed: {', '.join(sorted(_KEYS))})")
        when = d.get("when")
        if isinstance(when, str):
            when = [when]
        if not isinstance(when, list) or not when:
            raise RulesError(f"{where}: \"when\" must list at least one condition")
        conds = tuple(_condition(where, t) for t in when)
        ignore = d.get("ignore", False)
        if not isinstance(ignore, bool):
            raise RulesError(f"{where}: ignore must be true or false")
        cls, cls_from = d.get("class"), d.get("class_from")
        if sum(x is not None and x is not False for x in (cls, cls_from, ignore or None)) != 1:
            raise RulesError(f"{where}: give exactly one of class, class_from or ignore = true")
        ci = None
        if cls is not None:
            if not isinstance(cls, str) or cls not in _MAP_NAMES:
                raise RulesError(f"{where}: unknown class {cls!r} (map classes: {', '.join(_MAP_NAMES)})")
            ci = _MAP_NAMES[cls]
        for key in ("class_from", "width_from", "lanes_from"):
            if d.get(key) is not None and (not isinstance(d[key], str) or not d[key]):
                raise RulesError(f"{where}: {key} must name a property")
        geom = d.get("geometry", ())
        if isinstance(geom, str):
            geom = (geom,)
        if not isinstance(geom, (list, tuple)) or any(g not in KINDS for g in geom):
            raise RulesError(f"{where}: geometry must be one or more of {', '.join(KINDS)}")
        lw = _size(where, d, "lane_width_m")
        if d.get("lanes_from") is not None and lw is None:
            raise RulesError(f"{where}: lanes_from needs lane_width_m")
        needs = tuple(c.key for c in conds if not c.negate)
        out.append(Rule(n, conds, ci, cls_from, ignore, tuple(geom), _size(where, d, "width_m"),
                        d.get("width_from"), d.get("lanes_from"), lw, _size(where, d, "radius_m"), needs))
    return Rules(out, source)


def load_rules(path=None) -> Rules:
    """Load a rules file, or the default rules for common open-map tagging when ``path`` is None."""
    if path is None:
        return default_rules()
    return parse_rules(read_toml(path, cls=RulesError), str(path))


_DEFAULT = None


def default_rules() -> Rules:
    """The bundled rules (``tinyloc/maps/default_rules.toml``) for common open vector map tagging."""
    global _DEFAULT
    if _DEFAULT is None:
        import tomllib

        text = resources.files(__package__).joinpath("default_rules.toml").read_text(encoding="utf-8")
        _DEFAULT = parse_rules(tomllib.loads(text), "default rules")
    return _DEFAULT


def as_rules(rules) -> Rules:
    """Accept None (defaults), a path, or a :class:`Rules`."""
    if rules is None or isinstance(rules, Rules):
        return rules or default_rules()
    return load_rules(rules)
