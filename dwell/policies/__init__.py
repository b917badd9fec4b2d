"""Serving policies: the rules that choose a terminal's satellite.

Each ``[[policy]]`` table names a ``rule`` and its parameters; ``name`` is the label users choose.
Built-in rules live one per module in this package (see ``RULES``); a researcher adds a rule in a
single file and names it in the config as ``rule = "path/to/file.py:ClassName"`` (relative to
the config file).  See :mod:`dwell.policies.base` for the interface.

A plug-in file is Python code and runs with the user's rights when it is loaded: only commands
that run policies load it (``dwell run``, ``dwell sweep`` without ``--dry-run``); the others
check that the file exists and leave it unread (``load_rule(..., load_plugins=False)``).
An exception raised inside a plug-in's methods is reported as one line naming its file and line
(:class:`PluginError`).
"""

from __future__ import annotations

import ast
import functools
import hashlib
import importlib.util
import inspect
import traceback
from pathlib import Path
from typing import Any, Callable

from ..io.errors import InputError
from ..io.schema import check_table, label_check
from .base import COMMON_KEYS, Decision, Policy

RULES: dict[str, type[Policy]] = {}


def register(cls: type[Policy]) -> type[Policy]:
    RULES[cls.rule] = cls
    return cls


def _builtin() -> None:
    from . import a3, cho, geometric, reselection, rsrp  # noqa: F401  (modules register their rules)


def is_plugin(rule: str) -> bool:
    """Whether a rule names a plug-in file (``path/to/file.py:ClassName``)."""
    return isinstance(rule, str) and ":" in rule and rule.split(":", 1)[0].endswith(".py")


def _plugin_path(rule: str, base_dir: Path | None) -> tuple[Path, str]:
    file, cls_name = rule.split(":", 1)
    path = Path(file)
    if not path.is_absolute() and base_dir is not None:
        path = base_dir / path
    return path, cls_name


class PluginError(InputError):
    """A plug-in rule failed: names its file and the line where it raised."""


# plug-ins already executed in this process: (file, its sha256, class) -> wrapped class
_LOADED: dict[tuple[str, str, str], type[Policy]] = {}
# the methods dwell calls on a policy; a failure inside one is reported as the plug-in's
INTERFACE = ("__init__", "check", "score", "select", "scan", "start", "step")


def _line_in(exc: BaseException, path: Path) -> int | None:
    """The last line of ``path`` in the exception's traceback (where the plug-in failed)."""
    if isinstance(exc, SyntaxError) and exc.lineno and Path(exc.filename or "") == path:
        return exc.lineno
    line = None
    for frame in traceback.extract_tb(exc.__traceback__):
        if Path(frame.filename) == path:
            line = frame.lineno
    return line


def _plugin_failure(exc: BaseException, path: Path, what: str) -> PluginError:
    line = _line_in(exc, path)
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    text = text if len(text) <= 160 else text[:157] + "..."
    return PluginError(str(path), f"line {line}" if line else None, None,
                       f"{what} raised {type(exc).__name__}" + (f": {text}" if text else ""),
                       show_value=False)


def _guard(cls: type[Policy], path: Path) -> type[Policy]:
    """Wrap the interface methods a plug-in defines so that an exception inside one becomes a
    one-line :class:`PluginError` naming the file and line (costs one call frame per call)."""
    for name in INTERFACE:
        raw = inspect.getattr_static(cls, name, None)
        func = raw.__func__ if isinstance(raw, classmethod) else raw
        code = getattr(func, "__code__", None)
        if code is None or Path(code.co_filename) != path:
            continue                       # inherited from dwell: not the plug-in's code

        def wrapper(*args, _f=func, _what=f"{cls.__name__}.{name}", **kwargs):
            try:
                return _f(*args, **kwargs)
            except PluginError:
                raise
            except Exception as exc:
                raise _plugin_failure(exc, path, _what) from None
        functools.update_wrapper(wrapper, func)
        setattr(cls, name, classmethod(wrapper) if isinstance(raw, classmethod) else wrapper)
    return cls


def load_rule(rule: str, source: str, where: str, base_dir: Path | None = None, *,
              load_plugins: bool = True) -> type[Policy] | None:
    """The policy class for a rule name or a ``file.py:Class`` plug-in reference.

    A plug-in file is Python code: it is executed (once per process and file content) only
    with ``load_plugins``; without, its file is checked to exist and None is returned.
    """
    _builtin()   # idempotent: importing one rule module directly must not hide the others
    if rule in RULES:
        return RULES[rule]
    if is_plugin(rule):
        path, cls_name = _plugin_path(rule, base_dir)
        if not path.is_file():
            raise InputError(source, f"{where}.rule", rule, f"plug-in file {path} not found")
        if not load_plugins:
            return None
        path = path.resolve()
        try:
            digest = hashlib.sha256(path.read_bytes()).hexdigest()
        except OSError as exc:
            raise InputError(source, f"{where}.rule", rule,
                             f"cannot read the plug-in file ({exc.strerror or exc})") from None
        cached = _LOADED.get((str(path), digest, cls_name))
        if cached is not None:
            return cached
        spec = importlib.util.spec_from_file_location(f"dwell_plugin_{path.stem}", path)
        module = importlib.util.module_from_spec(spec)
        try:
            spec.loader.exec_module(module)
        except Exception as exc:  # a plug-in's own error, reported as input
            err = _plugin_failure(exc, path, "loading the plug-in")
            raise InputError(source, f"{where}.rule", rule, str(err)) from None
        cls = getattr(module, cls_name, None)
        if not (isinstance(cls, type) and issubclass(cls, Policy)):
            raise InputError(source, f"{where}.rule", rule,
                             f"{cls_name} is not a dwell.policies.Policy subclass in {path}")
        if cls.step is Policy.step and cls.scan is Policy.scan:
            raise InputError(source, f"{where}.rule", rule,
                             f"{cls_name} must implement step (and may implement scan)")
        _LOADED[(str(path), digest, cls_name)] = _guard(cls, path)
        return cls
    raise InputError(source, f"{where}.rule", rule,
                     "unknown rule; known rules: " + ", ".join(sorted(RULES)) +
                     " (or 'file.py:Class' for a plug-in)")


def plugin_keys(rule: str, base_dir: Path | None = None) -> set[str] | None:
    """The parameter names a plug-in class declares in a literal ``KEYS = {...}``, read from
    its source without running it (None when they cannot be read so)."""
    path, cls_name = _plugin_path(rule, base_dir)
    try:
        tree = ast.parse(path.read_bytes(), filename=str(path))
    except (OSError, SyntaxError, ValueError):
        return None
    for node in ast.walk(tree):
        if isinstance(node, ast.ClassDef) and node.name == cls_name:
            for item in node.body:
                target = item.targets[0] if isinstance(item, ast.Assign) and \
                    len(item.targets) == 1 else getattr(item, "target", None)
                value = getattr(item, "value", None)
                if isinstance(target, ast.Name) and target.id == "KEYS" and \
                        isinstance(value, ast.Dict):
                    keys = {k.value for k in value.keys
                            if isinstance(k, ast.Constant) and isinstance(k.value, str)}
                    return keys if None not in value.keys else None
    return None


def check_tables(tables: list[dict[str, Any]], source: str, warn: Callable[[str], None],
                 base_dir: Path | None = None, *, load_plugins: bool = True
                 ) -> list[dict[str, Any]]:
    """Check every ``[[policy]]`` table; each gets its rule's keys plus the common ones.

    Without ``load_plugins`` a plug-in rule's file must exist but is not run: its own
    parameters are then kept as written, unchecked (commands that run no policy)."""
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
        cls = load_rule(rule, source, where, base_dir, load_plugins=load_plugins)
        if cls is None:
            params = check_table(table, COMMON_KEYS, source, where, extra_ok=lambda key: True)
        else:
            params = check_table(table, {**COMMON_KEYS, **cls.KEYS}, source, where)
        if params["name"] is None:
            params["name"] = rule.split(":")[-1]
        reason = label_check(params["name"])
        if reason:
            raise InputError(source, f"{where}.name", params["name"], reason)
        if params["name"] in names:
            raise InputError(source, f"{where}.name", params["name"], "duplicate policy name")
        names.add(params["name"])
        if cls is not None:
            cls.check(params, source, where, warn)
        out.append(params)
    return out


def build(params: dict[str, Any], period_s: float, base_dir: Path | None = None) -> Policy:
    cls = load_rule(params["rule"], "config", "policy", base_dir)
    return cls(params, period_s)


__all__ = ["RULES", "Decision", "PluginError", "Policy", "build", "check_tables", "is_plugin",
           "load_rule", "plugin_keys", "register"]
