"""Serving policies: the rules that choose a terminal's satellite.

Each ``[[policy]]`` table names a ``rule`` and its parameters; ``name`` is the label users choose.
Built-in rules live one per module in this package (see ``RULES``); a researcher adds a rule in a
single file and names it in the config as ``rule = "path/to/file.py:ClassName"`` (relative to
the config file).  See :mod:`dwell.policies.base` for the interface.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path
from typing import Any, Callable

from ..io.errors import InputError
from ..io.schema import check_table
from .base import COMMON_KEYS, Decision, Policy

RULES: dict[str, type[Policy]] = {}


def register(cls: type[Policy]) -> type[Policy]:
    RULES[cls.rule] = cls
    return cls


def _builtin() -> None:
    from . import a3, cho, geometric, rsrp  # noqa: F401  (modules register their rules)


def load_rule(rule: str, source: str, where: str, base_dir: Path | None = None) -> type[Policy]:
    """The policy class for a rule name or a ``file.py:Class`` plug-in reference."""
    _builtin()   # idempotent: importing one rule module directly must not hide the others
    if rule in RULES:
        return RULES[rule]
    if ":" in rule and rule.split(":", 1)[0].endswith(".py"):
        file, cls_name = rule.split(":", 1)
        path = Path(file)
        if not path.is_absolute() and base_dir is not None:
            path = base_dir / path
        if not path.is_file():
            raise InputError(source, f"{where}.rule", rule, f"plug-in file {path} not found")
        spec = importlib.util.spec_from_file_location(f"dwell_plugin_{path.stem}", path)
        module = importlib.util.module_from_spec(spec)
        try:
            spec.loader.exec_module(module)
        except Exception as exc:  # a plug-in's own error, reported as input
            raise InputError(source, f"{where}.rule", rule, f"plug-in failed to load: {exc}") from None
        cls = getattr(module, cls_name, None)
        if not (isinstance(cls, type) and issubclass(cls, Policy)):
            raise InputError(source, f"{where}.rule", rule,
                             f"{cls_name} is not a dwell.policies.Policy subclass in {path}")
        if cls.step is Policy.step and cls.scan is Policy.scan:
            raise InputError(source, f"{where}.rule", rule,
                             f"{cls_name} must implement step (and may implement scan)")
        return cls
    raise InputError(source, f"{where}.rule", rule,
                     "unknown rule; known rules: " + ", ".join(sorted(RULES)) +
                     " (or 'file.py:Class' for a plug-in)")


def check_tables(tables: list[dict[str, Any]], source: str, warn: Callable[[str], None],
                 base_dir: Path | None = None) -> list[dict[str, Any]]:
    """Check every ``[[policy]]`` table; each gets its rule's keys plus the common ones."""
    out = []
    names: set[str] = set()
    for i, table in enumerate(tables):
        where = f"policy[{i + 1}]"
        if not isinstance(table, dict):
            raise InputError(source, where, table, "must be a table")
        rule = table.get("rule")
        if not isinstance(rule, str):
            raise InputError(source, f"{where}.rule", rule, "missing or not a string",
                             show_value=rule is not None)
        cls = load_rule(rule, source, where, base_dir)
        params = check_table(table, {**COMMON_KEYS, **cls.KEYS}, source, where)
        if params["name"] is None:
            params["name"] = rule.split(":")[-1]
        if params["name"] in names:
            raise InputError(source, f"{where}.name", params["name"], "duplicate policy name")
        names.add(params["name"])
        cls.check(params, source, where, warn)
        out.append(params)
    return out


def build(params: dict[str, Any], period_s: float, base_dir: Path | None = None) -> Policy:
    cls = load_rule(params["rule"], "config", "policy", base_dir)
    return cls(params, period_s)


__all__ = ["RULES", "Decision", "Policy", "build", "check_tables", "load_rule", "register"]
