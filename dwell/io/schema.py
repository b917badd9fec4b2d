"""Declarative checking of TOML tables: known keys, types, ranges, defaults.

A table spec is a ``dict[str, Field]``.  :func:`check_table` returns a plain dict holding every key
of the spec (defaults filled in) or raises :class:`~dwell.errors.InputError` naming the file, the
key path and the value.  Nothing here knows about satellites; config modules own the specs.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable

from .errors import InputError

REQUIRED = object()

Check = Callable[[Any], "str | None"]


@dataclass(frozen=True)
class Field:
    """One key of a table: accepted types, default (``REQUIRED`` if none) and extra checks.

    ``kinds`` are Python types after TOML decoding; ``int`` values are accepted where ``float``
    is allowed.  Each check returns ``None`` when the value is fine, else the reason.
    """

    kinds: tuple[type, ...]
    default: Any = REQUIRED
    checks: tuple[Check, ...] = ()
    doc: str = ""
    choices: tuple[Any, ...] | None = None
    item_kinds: tuple[type, ...] | None = None  # for lists
    sub: dict[str, "Field"] | None = field(default=None)  # for inline/sub tables


def number(default: Any = REQUIRED, *checks: Check, doc: str = "") -> Field:
    return Field((int, float), default, checks, doc)


def integer(default: Any = REQUIRED, *checks: Check, doc: str = "") -> Field:
    return Field((int,), default, checks, doc)


def text(default: Any = REQUIRED, *checks: Check, doc: str = "", choices=None) -> Field:
    return Field((str,), default, checks, doc, tuple(choices) if choices else None)


NAME_MAX_CHARS = 200   # labels end up in table cells, file names and one-line messages


def label_check(v: Any) -> str | None:
    """A label (terminal, policy, constellation, scenario name): not empty, at most
    ``NAME_MAX_CHARS`` characters, no control characters (they would break one-line output)."""
    if not v.strip():
        return "must not be empty"
    if len(v) > NAME_MAX_CHARS:
        return f"is {len(v)} characters long; at most {NAME_MAX_CHARS} are allowed"
    if any(ord(c) < 32 or ord(c) == 127 for c in v):
        return "must not contain control characters (newline, tab, ...)"
    return None


def label(default: Any = REQUIRED, doc: str = "") -> Field:
    return Field((str,), default, (label_check,), doc)


FOLLOW_SCENARIO = "scenario"   # a part's seed written so follows the scenario seed


def _seed_check(v: Any) -> str | None:
    if isinstance(v, str):
        return None if v == FOLLOW_SCENARIO else \
            f"must be a whole number >= 0 or \"{FOLLOW_SCENARIO}\""
    return None if v >= 0 else "must be >= 0"


def seed(doc: str = "random seed (default, or \"scenario\": derived from the scenario seed)"
         ) -> Field:
    """A part's own seed: a whole number fixes it (a sweep over scenario.seed then leaves the
    part unchanged); absent or ``"scenario"`` derives it from the scenario seed.  Checked values
    hold None for the latter (see :func:`follow_scenario`)."""
    return Field((int, str), None, (_seed_check,), doc)


def follow_scenario(params: dict | None, key: str = "seed") -> None:
    """Normalise ``seed = "scenario"`` to None (absent): both derive from the scenario seed."""
    if isinstance(params, dict) and params.get(key) == FOLLOW_SCENARIO:
        params[key] = None


def flag(default: Any = REQUIRED, doc: str = "") -> Field:
    return Field((bool,), default, (), doc)


def numbers(default: Any = REQUIRED, *checks: Check, doc: str = "") -> Field:
    return Field((list,), default, checks, doc, item_kinds=(int, float))


def table(sub: dict[str, Field], default: Any = None, doc: str = "") -> Field:
    return Field((dict,), default, (), doc, sub=sub)


# ---- checks -----------------------------------------------------------------------------------

def gt(lo: float) -> Check:
    return lambda v: None if v > lo else f"must be > {lo:g}"


def ge(lo: float) -> Check:
    return lambda v: None if v >= lo else f"must be >= {lo:g}"


def le(hi: float) -> Check:
    return lambda v: None if v <= hi else f"must be <= {hi:g}"


def lt(hi: float) -> Check:
    return lambda v: None if v < hi else f"must be < {hi:g}"


def between(lo: float, hi: float) -> Check:
    return lambda v: None if lo <= v <= hi else f"must be between {lo:g} and {hi:g}"


def nonempty(v: Any) -> str | None:
    return None if len(v) > 0 else "must not be empty"


def finite(v: Any) -> str | None:
    return None if math.isfinite(v) else "must be a finite number"


# ---- the checker ------------------------------------------------------------------------------

def _type_ok(value: Any, kinds: tuple[type, ...]) -> bool:
    if isinstance(value, bool) and bool not in kinds:
        return False  # TOML true is not a number here
    return isinstance(value, kinds)


def _kind_names(kinds: tuple[type, ...]) -> str:
    names = {int: "an integer", float: "a number", str: "a string", bool: "true or false",
             list: "a list", dict: "a table"}
    if set(kinds) == {int, float}:
        return "a number"
    return " or ".join(names.get(k, k.__name__) for k in kinds)


def check_value(value: Any, spec: Field, source: str, path: str) -> Any:
    """Check one value against its field; returns the value (floats normalised)."""
    if not _type_ok(value, spec.kinds):
        raise InputError(source, path, value, f"must be {_kind_names(spec.kinds)}")
    if float in spec.kinds and isinstance(value, (int, float)) and not isinstance(value, bool):
        if not math.isfinite(value):
            raise InputError(source, path, value, "must be a finite number")
        value = float(value) if int not in spec.kinds or isinstance(value, float) else value
    if spec.choices is not None and value not in spec.choices:
        raise InputError(source, path, value,
                         "must be one of " + ", ".join(repr(c) for c in spec.choices))
    if spec.item_kinds is not None:
        for i, item in enumerate(value):
            if not _type_ok(item, spec.item_kinds):
                raise InputError(source, f"{path}[{i}]", item,
                                 f"must be {_kind_names(spec.item_kinds)}")
            if isinstance(item, float) and not math.isfinite(item):
                raise InputError(source, f"{path}[{i}]", item, "must be a finite number")
    if spec.sub is not None:
        value = check_table(value, spec.sub, source, path)
    for chk in spec.checks:
        reason = chk(value)
        if reason:
            raise InputError(source, path, value, reason)
    return value


def check_table(raw: dict[str, Any], spec: dict[str, Field], source: str, path: str,
                *, extra_ok: Callable[[str], bool] | None = None) -> dict[str, Any]:
    """Check a decoded TOML table against ``spec``; unknown keys are errors.

    ``extra_ok(key)`` may admit keys outside the spec (policy parameters); those are returned
    unchecked for their owner to check.
    """
    if not isinstance(raw, dict):
        raise InputError(source, path, raw, "must be a table")
    out: dict[str, Any] = {}
    for key, value in raw.items():
        where = f"{path}.{key}" if path else key
        if key in spec:
            out[key] = check_value(value, spec[key], source, where)
        elif extra_ok is not None and extra_ok(key):
            out[key] = value
        else:
            known = ", ".join(sorted(spec))
            raise InputError(source, where, value, f"unknown key (known keys: {known})")
    for key, f in spec.items():
        if key not in out:
            if f.default is REQUIRED:
                where = f"{path}.{key}" if path else key
                raise InputError(source, where, None, "missing required key", show_value=False)
            out[key] = f.default
    return out
