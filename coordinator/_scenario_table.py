"""Checking one TOML table: typed getters whose every error names the source file, the table and
the key, and the small value checks the section readers share.
"""

from __future__ import annotations

import difflib
import json
import keyword
import math
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, NoReturn

import numpy as np

from coordinator import _limits as lim
from coordinator._scenario_schema import _REQUIRED, _SUM_TOLERANCE_TEXT, PRIORITY_SUM_TOLERANCE
from topologies._errors import ScenarioError

# --------------------------------------------------------------------------- value checks


class _Table:
    """One table being checked; every error it raises names the source and the key."""

    __slots__ = ("data", "label", "sep", "source")

    def __init__(self, data: Mapping[str, Any], label: str, source: str, sep: str = ".") -> None:
        self.data = data
        self.label = label
        self.source = source
        self.sep = sep

    def where(self, key: str | None) -> str:
        return self.label if key is None else f"{self.label}{self.sep}{key}"

    def fail(self, key: str | None, message: str) -> NoReturn:
        raise ScenarioError(f"{self.source}: {self.where(key)}: {message}")

    def sub(self, key: str) -> _Table:
        return _Table(self.data[key], self.where(key), self.source)

    def check_keys(
        self, allowed: Sequence[str], *, used: Sequence[str] | None = None, by: str = ""
    ) -> None:
        """Refuse keys outside ``allowed``; with ``used``, also keys that ``by`` does not take."""
        for key in self.data:
            if key not in allowed:
                hint = _did_you_mean(str(key), allowed)
                hint_text = f' (did you mean "{hint}"?)' if hint else ""
                self.fail(
                    None,
                    f'unknown key "{key}"; expected one of: {", ".join(allowed)}{hint_text}',
                )
            if used is not None and key not in used:
                self.fail(key, f"not used by {by}; it takes: {', '.join(used)}")

    def _get(self, key: str, default: Any, expected: str) -> tuple[Any, bool]:
        if key in self.data:
            return self.data[key], True
        if default is _REQUIRED:
            self.fail(key, f"missing; expected {expected}")
        return default, False

    def integer(
        self,
        key: str,
        *,
        lo: int | None = None,
        hi: int | None = None,
        default: Any = _REQUIRED,
        why: str = "",
    ) -> Any:
        """``why`` explains the upper bound; it is said only when the bound is passed."""
        expected = _range_text("an integer", lo, False, hi, False)
        value, given = self._get(key, default, expected)
        if not given:
            return value
        if not _is_int(value) or (lo is not None and value < lo):
            self.fail(key, f"expected {expected}, got {_show(value)}")
        if hi is not None and value > hi:
            self.fail(key, f"expected {expected}{_because(why)}, got {_show(value)}")
        return int(value)

    def number(
        self,
        key: str,
        *,
        lo: float | None = None,
        lo_open: bool = False,
        hi: float | None = None,
        hi_open: bool = False,
        default: Any = _REQUIRED,
        why: str = "",
    ) -> Any:
        """``why`` explains the upper bound; it is said only when the bound is passed."""
        expected = _range_text("a number", lo, lo_open, hi, hi_open)
        value, given = self._get(key, default, expected)
        if not given:
            return value
        if not _is_number(value):
            self.fail(key, f"expected {expected}, got {_show(value)}")
        x = float(value)
        if not math.isfinite(x):
            self.fail(key, f"expected a finite number, got {_show(value)}")
        below = lo is not None and (x <= lo if lo_open else x < lo)
        above = hi is not None and (x >= hi if hi_open else x > hi)
        if below or above:
            self.fail(
                key, f"expected {expected}{_because(why) if above else ''}, got {_show(value)}"
            )
        return x

    def choice(self, key: str, choices: Sequence[str], *, default: Any = _REQUIRED) -> Any:
        expected = "one of " + ", ".join(f'"{c}"' for c in choices)
        value, given = self._get(key, default, expected)
        if given and value not in choices:
            hint = _did_you_mean(value, choices) if isinstance(value, str) else None
            hint_text = f' (did you mean "{hint}"?)' if hint else ""
            self.fail(key, f"expected {expected}, got {_show(value)}{hint_text}")
        return value

    def string(
        self,
        key: str,
        pattern: re.Pattern[str] | None,
        expected: str,
        *,
        default: Any = _REQUIRED,
        check: Any = None,
    ) -> Any:
        value, given = self._get(key, default, expected)
        if not given:
            return value
        ok = isinstance(value, str) and value != ""
        ok = ok and (pattern is None or pattern.fullmatch(value) is not None)
        ok = ok and (check is None or check(value))
        if not ok:
            self.fail(key, f"expected {expected}, got {_show(value)}")
        return value

    def boolean(self, key: str, *, default: Any = _REQUIRED) -> Any:
        value, given = self._get(key, default, "true or false")
        if given and not isinstance(value, bool):
            self.fail(key, f"expected true or false, got {_show(value)}")
        return value


def _because(why: str) -> str:
    return f" ({why})" if why else ""


def _array_of_tables(raw: Any, name: str, src: str) -> list[Mapping[str, Any]]:
    if isinstance(raw, Mapping):
        raise ScenarioError(
            f"{src}: [{name}]: expected [[{name}]] tables (an array of tables), got one [{name}] table"
        )
    if not _is_seq(raw):
        raise ScenarioError(
            f"{src}: [[{name}]]: expected [[{name}]] tables (an array of tables), got {_show(raw)}"
        )
    for pos, entry in enumerate(raw):
        if not isinstance(entry, Mapping):
            raise ScenarioError(f"{src}: [[{name}]] #{pos}: expected a table, got {_show(entry)}")
    return list(raw)


def _vector(t: _Table, key: str, value: Any, length: int, why: str) -> list[float]:
    if not _is_seq(value) or len(value) != length:
        t.fail(key, f"expected a list of {length} numbers ({why}), got {_count(value)}")
    out = []
    for i, x in enumerate(value):
        if not _is_number(x) or not math.isfinite(float(x)):
            t.fail(f"{key}[{i}]", f"expected a finite number, got {_show(x)}")
        out.append(float(x))
    return out


def _spd_matrix(t: _Table, key: str, value: Any, d: int) -> list[list[float]]:
    """A d x d symmetric positive definite matrix, as lists of floats."""
    if not _is_seq(value) or len(value) != d:
        t.fail(
            key,
            f"expected a {d} x {d} matrix (a list of {d} rows, [swarm].dimension = {d}),"
            f" got {_count(value)}",
        )
    rows = [
        _vector(t, f"{key}[{i}]", row, d, f"[swarm].dimension = {d}") for i, row in enumerate(value)
    ]
    q = np.array(rows, dtype=float)
    scale = max(1.0, float(np.abs(q).max()))
    asym = np.abs(q - q.T)
    i, j = np.unravel_index(int(np.argmax(asym)), asym.shape)
    # entries written by hand are symmetric exactly; leave room only for rounding
    if asym[i, j] > 1e-12 * scale:
        t.fail(key, f"not symmetric: [{i}][{j}] = {q[i, j]:g} but [{j}][{i}] = {q[j, i]:g}")
    smallest = float(np.linalg.eigvalsh(q)[0])
    if smallest <= 1e-12 * scale:
        t.fail(key, f"not positive definite (smallest eigenvalue {smallest:.6g})")
    return rows


def _bounded_norm(t: _Table, key: str, vec: list[float]) -> list[float]:
    norm = math.hypot(*vec)
    if norm > lim.MAGNITUDE_MAX:
        t.fail(
            key,
            f"its norm is {norm:.4g}; expected at most {lim.MAGNITUDE_MAX:g}"
            f" ({lim.WHY['magnitude']})",
        )
    return vec


def _priority_vector(t: _Table, key: str, value: Any, n: int) -> list[float]:
    vec = _vector(t, key, value, n, f"one priority per agent, [swarm].agents = {n}")
    for i, x in enumerate(vec):
        if x < 0:
            t.fail(f"{key}[{i}]", f"expected a priority >= 0, got {_show(value[i])}")
    total = math.fsum(vec)
    if abs(total - 1.0) > PRIORITY_SUM_TOLERANCE:
        t.fail(key, f"entries sum to {total:.12g}; expected 1 within {_SUM_TOLERANCE_TEXT}")
    return vec


def _id_list(t: _Table, key: str, n: int, *, value: Any = _REQUIRED) -> list[int]:
    if value is _REQUIRED:
        value, _ = t._get(key, _REQUIRED, f"a non-empty list of agent ids in [0, {n - 1}]")
    if not _is_seq(value) or len(value) == 0:
        t.fail(key, f"expected a non-empty list of agent ids in [0, {n - 1}], got {_show(value)}")
    out: list[int] = []
    for i, a in enumerate(value):
        if not _is_int(a) or not 0 <= a < n:
            t.fail(f"{key}[{i}]", f"expected an agent id in [0, {n - 1}], got {_show(a)}")
        if int(a) in out:
            t.fail(f"{key}[{i}]", f"agent {a} is listed twice")
        out.append(int(a))
    return out


def _is_int(v: Any) -> bool:
    return isinstance(v, int | np.integer) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float | np.integer | np.floating) and not isinstance(v, bool)


def _is_seq(v: Any) -> bool:
    return isinstance(v, list | tuple) or (isinstance(v, np.ndarray) and v.ndim >= 1)


def _is_table(v: Any) -> bool:
    return isinstance(v, Mapping)


def _is_dotted(s: str) -> bool:
    return all(p.isidentifier() and not keyword.iskeyword(p) for p in s.split("."))


def _is_function_path(s: str) -> bool:
    module, sep, attr = s.partition(":")
    return bool(sep) and _is_dotted(module) and _is_dotted(attr)


def _count(v: Any) -> str:
    if _is_seq(v):
        return f"a list of {len(v)}"
    return _show(v)


def _show(v: Any) -> str:
    """A value as the user wrote it (TOML spelling), shortened."""
    if isinstance(v, bool | np.bool_):
        return "true" if v else "false"
    if isinstance(v, str):
        text = json.dumps(v, ensure_ascii=False)
        return text if len(text) <= 60 else text[:56] + '..."'
    if isinstance(v, Mapping):
        return "a table"
    if _is_seq(v):
        items = list(v)
        inner = ", ".join(_show(x) for x in items[:6])
        return f"[{inner}{', ...' if len(items) > 6 else ''}]"
    if isinstance(v, float | np.floating):
        return repr(float(v))
    return str(v)


def _range_text(kind: str, lo: float | None, lo_open: bool, hi: float | None, hi_open: bool) -> str:
    def num(x: float) -> str:
        return str(x) if isinstance(x, int) else f"{x:g}"

    if lo is not None and hi is not None:
        left, right = "(" if lo_open else "[", ")" if hi_open else "]"
        return f"{kind} in {left}{num(lo)}, {num(hi)}{right}"
    if lo is not None:
        return f"{kind} {'>' if lo_open else '>='} {num(lo)}"
    if hi is not None:
        return f"{kind} {'<' if hi_open else '<='} {num(hi)}"
    return kind


def _did_you_mean(word: str, choices: Sequence[str]) -> str | None:
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.75)
    return close[0] if close else None


def _short_path(text: str) -> str:
    """A path fit for a message: a very long one keeps its start and its end."""
    return text if len(text) <= 160 else f"{text[:80]}...{text[-60:]} ({len(text)} characters)"


def is_file(path: Path) -> bool:
    """Whether ``path`` is a file; False also for a name the system refuses (too long)."""
    try:
        return path.is_file()
    except OSError:  # ENAMETOOLONG and the like: no file can have that name
        return False
