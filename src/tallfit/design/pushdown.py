"""The part of a WHERE condition a reader can use to skip data without reading it.

Top-level AND-ed comparisons of a column with a literal (``cpu_util > 0.05``, ``region =
'north-1'``, ``day >= '2026-11-03'``) are turned into a test on a column's [min, max] range:
Parquet row-group statistics and hive partition values then let the reader skip row groups
or whole files that cannot hold a matching row. Anything else in the condition is simply not
used for skipping; the full condition is still evaluated on every batch that is read, so
skipping never changes the answer, only the work.
"""

from __future__ import annotations

import re
from collections.abc import Callable

_CMP = re.compile(
    r"^\s*(?P<col>[A-Za-z_][A-Za-z0-9_]*)\s*(?P<op><=|>=|<>|!=|==|=|<|>)\s*"
    r"(?P<val>'(?:[^']|'')*'|[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*$"
)
_FLIP = {"<": ">", ">": "<", "<=": ">=", ">=": "<=", "=": "=", "==": "==", "!=": "!=", "<>": "<>"}
_CMP_REV = re.compile(
    r"^\s*(?P<val>'(?:[^']|'')*'|[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*"
    r"(?P<op><=|>=|<>|!=|==|=|<|>)\s*(?P<col>[A-Za-z_][A-Za-z0-9_]*)\s*$"
)

Range = tuple[object, object]  # (min, max) of a column over a row group or file
Prune = Callable[[dict[str, Range]], bool]  # False: no row there can match


def _split_and(text: str) -> list[str] | None:
    """Split on top-level AND (outside quotes and parentheses); None if OR/NOT appear at top level."""
    parts, depth, quote, start, i = [], 0, False, 0, 0
    upper = text.upper()
    while i < len(text):
        ch = text[i]
        if ch == "'":
            quote = not quote
        elif not quote:
            if ch == "(":
                depth += 1
            elif ch == ")":
                depth -= 1
            elif depth == 0 and re.match(r"\bAND\b", upper[i:]) and (i == 0 or not upper[i - 1].isalnum()):
                parts.append(text[start:i])
                i += 3
                start = i
                continue
            elif depth == 0 and (re.match(r"\bOR\b", upper[i:]) or re.match(r"\bNOT\b", upper[i:])) and (
                i == 0 or not upper[i - 1].isalnum()
            ):
                return None
        i += 1
    parts.append(text[start:])
    return parts


def _literal(text: str):
    if text.startswith("'"):
        return text[1:-1].replace("''", "'")
    return float(text)


def comparisons(where: str | None) -> list[tuple[str, str, object]]:
    """The (column, operator, literal) conjuncts of a WHERE condition usable for skipping."""
    if not where:
        return []
    parts = _split_and(where)
    if parts is None:
        return []
    out = []
    for part in parts:
        p = part.strip()
        while p.startswith("(") and p.endswith(")"):
            p = p[1:-1].strip()
        m = _CMP.match(p)
        if m:
            out.append((m["col"], m["op"], _literal(m["val"])))
            continue
        m = _CMP_REV.match(p)
        if m:
            out.append((m["col"], _FLIP[m["op"]], _literal(m["val"])))
    return out


def _may_hold(op: str, value, lo, hi) -> bool:
    try:
        if op in ("=", "=="):
            return lo <= value <= hi
        if op in ("!=", "<>"):
            return not (lo == hi == value)
        if op == "<":
            return lo < value
        if op == "<=":
            return lo <= value
        if op == ">":
            return hi > value
        if op == ">=":
            return hi >= value
    except TypeError:  # a string compared with a number: cannot decide, so read it
        return True
    return True


def pruner(where: str | None) -> Prune | None:
    """A test on column ranges that is False only where no row can satisfy the condition."""
    conds = comparisons(where)
    if not conds:
        return None

    def may_match(ranges: dict[str, Range]) -> bool:
        for col, op, value in conds:
            r = ranges.get(col)
            if r is None or r[0] is None or r[1] is None:
                continue
            lo, hi = r
            if isinstance(value, float) and isinstance(lo, (int, float)) and isinstance(hi, (int, float)):
                lo, hi = float(lo), float(hi)
            if not _may_hold(op, value, lo, hi):
                return False
        return True

    return may_match
