"""Small value checkers for the sweep file: each names what it expected and what it got.

`Checker` collects problems with their key paths so that `config.py` can raise
them all at once; the `as_*` functions check one value and raise ValueError
with the wording users see (`must be a positive integer, got -2`).
"""
from __future__ import annotations

import difflib
import json
import math
from typing import Any, Callable


class Checker:
    """Collects problems with their key paths."""

    def __init__(self) -> None:
        self.problems: list[str] = []

    def add(self, path: str, msg: str) -> None:
        self.problems.append(f"{path}: {msg}")

    def keys(self, path: str, got: Any, allowed: tuple[str, ...]) -> dict[str, Any]:
        if got is None:
            return {}
        if not isinstance(got, dict):
            self.add(path or "top level", f"must be a mapping of keys, got {show(got)}")
            return {}
        for key in got:
            if key not in allowed:
                near = difflib.get_close_matches(clip(str(key)), allowed, n=1)
                hint = f" (did you mean '{near[0]}'?)" if near else f"; allowed: {', '.join(allowed)}"
                where = f" in {path}" if path else ""
                self.problems.append(f"unknown key '{clip(str(key))}'{where}{hint}")
        return got

    def take(self, d: dict[str, Any], path: str, key: str, check: Callable[[Any], Any], default: Any) -> Any:
        if key not in d or d[key] is None and default is None:
            return default
        try:
            return check(d[key])
        except ValueError as exc:
            self.add(f"{path}.{key}" if path else key, str(exc))
            return default


#: Longest echo of a user's value in a message; longer ones end in "…" so an error stays one short line.
SHOW_MAX = 80


def clip(text: str, limit: int = SHOW_MAX) -> str:
    """`text` cut to `limit` characters, the last one "…" when anything was cut."""
    return text if len(text) <= limit else text[:limit - 1] + "…"


def show(v: Any) -> str:
    """A value as the user wrote it (strings quoted), at most SHOW_MAX characters."""
    if isinstance(v, str):
        return clip(repr(v[:SHOW_MAX + 2]))
    try:
        text = json.dumps(v, default=str)
    except (ValueError, RecursionError):  # a structure that contains itself
        text = f"a {type(v).__name__} that contains itself"
    return clip(text)


def as_int(lo: int = 1) -> Callable[[Any], int]:
    def check(v: Any) -> int:
        if isinstance(v, bool) or not isinstance(v, int) or v < lo:
            what = "a positive integer" if lo == 1 else f"an integer >= {lo}"
            raise ValueError(f"must be {what}, got {show(v)}")
        return v
    return check


def as_float(lo: float = 0.0, hi: float = math.inf, lo_open: bool = True, hi_open: bool = False) -> Callable[[Any], float]:
    def check(v: Any) -> float:
        ok = isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)
        if ok:
            ok = (v > lo if lo_open else v >= lo) and (v < hi if hi_open else v <= hi)
        if not ok:
            lo_s = f"> {lo:g}" if lo_open else f">= {lo:g}"
            hi_s = "" if math.isinf(hi) else (f" and < {hi:g}" if hi_open else f" and <= {hi:g}")
            raise ValueError(f"must be a number {lo_s}{hi_s}, got {show(v)}")
        return float(v)
    return check


def as_choice(options: tuple[str, ...]) -> Callable[[Any], str]:
    def check(v: Any) -> str:
        if not isinstance(v, str) or v.lower() not in options:
            near = difflib.get_close_matches(clip(str(v)).lower(), options, n=1)
            hint = f" (did you mean '{near[0]}'?)" if near else ""
            raise ValueError(f"must be one of {', '.join(options)}, got {show(v)}{hint}")
        return v.lower()
    return check


def as_text(v: Any) -> str:
    if not isinstance(v, str) or not v.strip():
        raise ValueError(f"must be a non-empty string, got {show(v)}")
    return v


def as_flag(v: Any) -> bool:
    if not isinstance(v, bool):
        raise ValueError(f"must be true or false, got {show(v)}")
    return v


def int_list(c: Checker, path: str, v: Any, *, unique: bool = True, lo: int = 1) -> tuple[int, ...] | None:
    if not isinstance(v, list) or not v:
        what = "positive integers" if lo == 1 else f"integers >= {lo}"
        c.add(path, f"must be a non-empty list of {what}, got {show(v)}")
        return None
    out, ok = [], True
    for i, x in enumerate(v):
        try:
            out.append(as_int(lo)(x))
        except ValueError as exc:
            c.add(f"{path}[{i}]", str(exc))
            ok = False
    if ok and unique and len(set(out)) != len(out):
        c.add(path, f"must not repeat a value, got {show(v)}")
        ok = False
    return tuple(out) if ok else None
