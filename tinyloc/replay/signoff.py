"""Sign-off rules: thresholds on a run's metrics, e.g. ``recall/1m_3deg>=0.9``, checked after a replay.

A rule is ``KEY OP NUMBER``: KEY is a path in metrics.json with ``/`` between levels
(``median_error_m``, ``recall/1m_3deg``, ``quality/tracking_but_wrong_share``), OP one of
``>= <= > < ==``. A rule on a value that does not exist (``null``: no truth, never fixed)
fails: a sign-off cannot pass on missing evidence.
"""

from __future__ import annotations

from dataclasses import dataclass
import math
import operator
import re

from ..errors import InputError

_OPS = {">=": operator.ge, "<=": operator.le, ">": operator.gt, "<": operator.lt, "==": operator.eq}
_RULE = re.compile(r"^\s*([A-Za-z0-9_.|/-]+)\s*(>=|<=|==|>|<)\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*$")


@dataclass(frozen=True)
class Rule:
    """One sign-off rule."""

    key: str
    op: str
    value: float

    def __str__(self) -> str:
        return f"{self.key}{self.op}{self.value:g}"


def parse_rule(text: str) -> Rule:
    """Parse ``KEY OP NUMBER``; raises InputError naming the rule."""
    m = _RULE.match(str(text))
    if not m:
        raise InputError(f"--require: expected KEY>=NUMBER (or <=, >, <, ==) such as recall/1m_3deg>=0.9, "
                         f"got {text!r}")
    return Rule(m.group(1), m.group(2), float(m.group(3)))


def _lookup(metrics: dict, key: str):
    v = metrics
    for part in key.split("/"):
        if not isinstance(v, dict) or part not in v:
            return None, False
        v = v[part]
    return v, True


def check(metrics: dict, rules: list[Rule]) -> dict:
    """Evaluate the rules on one run's metrics.

    Returns
    -------
    dict
        ``{"passed": bool, "checks": [{"rule", "value", "passed", "why"}]}``; ``passed`` is True
        when every rule holds (and vacuously for no rules).
    """
    out = []
    for r in rules:
        v, found = _lookup(metrics, r.key)
        if not found:
            out.append({"rule": str(r), "value": None, "passed": False, "why": "no such figure in metrics.json"})
            continue
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(float(v)):
            out.append({"rule": str(r), "value": None, "passed": False, "why": "no value (null)"})
            continue
        ok = bool(_OPS[r.op](float(v), r.value))
        out.append({"rule": str(r), "value": float(v), "passed": ok, "why": "" if ok else "threshold not met"})
    return {"passed": all(c["passed"] for c in out), "checks": out}
