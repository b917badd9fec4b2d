"""Sweep files: a base scenario plus axes to vary, expanded into runs.

Sweep file (TOML)::

    [sweep]
    base = "demo.toml"          # the base scenario (relative to this file)
    mode = "grid"               # grid: every combination; list: the [[combination]] tables
    name = "a3-thresholds"

    [[axis]]                    # one table per varied key
    key = "policy.*.hysteresis_db"   # scenario.<k>, link.<k>, constellation.<name>.<k>,
    values = [0, 1, 2]               # terminal.<name>.<k> (nested: terminal.x.canyon.<k>),
                                     # policy.<name>.<k> ('*' = every policy having the key)
    [[axis]]
    key = "policy"              # which base policies run (by name)
    values = ["a3", "cho-d2"]

    [[axis]]
    key = "scenario.seed"
    values = [1, 2, 3]

    [[axis]]                    # a set of terminals instead of the base ones
    key = "terminal"
    sites = { kind = "latitude-band", lat_min_deg = 0, lat_max_deg = 60, count = 7, lon_deg = 10 }
    # kind = "random-region": lat/lon box and count (seeded); kind = "list": sites = [{...}]

    [overrides]                 # fixed changes to the base, e.g. a shorter duration
    "scenario.duration_s" = 14400

A *run* is one combination: the base with the combination's values, all terminals, the
selected policies.  Runs that differ only in policy keys share one *task*: one geometry pass
and one measurement stream per terminal serve all of their policies.
"""

from __future__ import annotations

import copy
import hashlib
import itertools
import json
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np

from ..io.config import canonical_config, read_toml, scenario_from_dict
from ..io.errors import InputError
from ..io.schema import REQUIRED, Field, between, check_table, ge, integer, nonempty, text

SWEEP_KEYS = {
    "base": text(REQUIRED, doc="base scenario file"),
    "mode": text("grid", choices=("grid", "list"), doc="grid or list of combinations"),
    "name": text("sweep", doc="label"),
}
AXIS_KEYS = {
    "key": text(REQUIRED, doc="what to vary"),
    "values": Field((list,), None, (), "the values"),
    "sites": Field((dict,), None, (), "generated terminal sets (key = \"terminal\")"),
}
SITE_KINDS = ("latitude-band", "random-region", "list")


@dataclass
class Axis:
    key: str
    values: list[Any]
    labels: list[Any]          # what the summary's parameter column shows per value


@dataclass
class Run:
    params: dict[str, Any]     # axis key -> label
    scenario: dict[str, Any]   # resolved-by-overrides raw scenario dict (one run)
    policy_names: list[str]    # base policy names this run includes
    key: str = ""              # hash of the run's resolved config
    task: str = ""             # hash of the run's non-policy config


@dataclass
class SweepPlan:
    source: str
    base_dir: Path
    name: str
    axes: list[Axis]
    runs: list[Run] = field(default_factory=list)
    tasks: dict[str, list[Run]] = field(default_factory=dict)
    fingerprint: str = ""      # hash of the expanded plan: every run's key and parameters
    notes: list[str] = field(default_factory=list)   # warnings about the plan itself


def _split(path: str) -> list[str]:
    return [p for p in path.split(".") if p]


def _find_named(tables: list[dict], name: str, kind: str, source: str, where: str) -> list[dict]:
    if name == "*":
        return tables
    if name.startswith("[") and name.endswith("]"):
        try:
            return [tables[int(name[1:-1]) - 1]]
        except (ValueError, IndexError):
            raise InputError(source, where, name, f"no {kind} with that index") from None
    hit = [t for t in tables if t.get("name") == name]
    if not hit:
        known = ", ".join(str(t.get("name")) for t in tables)
        raise InputError(source, where, name, f"no {kind} named so (known: {known})")
    return hit


def apply_override(raw: dict, key: str, value: Any, source: str, where: str,
                   base_dir: Path | None = None) -> None:
    """Set ``key`` (a dotted path, see the module docstring) in a raw scenario dict."""
    parts = _split(key)
    if not parts:
        raise InputError(source, where, key, "empty key")
    head = parts[0]
    if head in ("scenario", "link"):
        if len(parts) != 2:
            raise InputError(source, where, key, f"use {head}.<key>")
        raw.setdefault(head, {})[parts[1]] = value
        return
    if head in ("constellation", "terminal", "policy"):
        if len(parts) < 3:
            raise InputError(source, where, key, f"use {head}.<name>.<key> ('*' for all)")
        tables = raw.get(head, [])
        if isinstance(tables, dict):      # one [table] written without the double brackets
            tables = raw[head] = [tables]
        if not isinstance(tables, list) or not all(isinstance(t, dict) for t in tables):
            raise InputError(source, where, key, f"the base scenario's {head} must be "
                             f"[[{head}]] tables")
        targets = _find_named(tables, parts[1], head, source, where)
        if parts[1] == "*":
            targets = [t for t in targets if head != "policy" or _has_key(t, parts[2:], base_dir)]
            if not targets:
                raise InputError(source, where, key, "no table has this key")
        for t in targets:
            node = t
            for p in parts[2:-1]:
                node = node.setdefault(p, {})
            node[parts[-1]] = value
        return
    raise InputError(source, where, key, "must start with scenario, link, constellation, "
                     "terminal or policy")


def _has_key(table: dict, rest: list[str], base_dir: Path | None) -> bool:
    """Whether a policy table's rule has the key.  A plug-in is not run to find out: its
    ``KEYS`` are read from its source (or, if not written as a literal, the table's own keys)."""
    from .. import policies
    rule = table.get("rule", "")
    if policies.is_plugin(rule):
        keys = policies.plugin_keys(rule, base_dir)
        own = set(table) if keys is None else keys
        return rest[0] in set(policies.COMMON_KEYS) | own
    try:
        cls = policies.load_rule(rule, "", "", load_plugins=False)
    except InputError:
        return False
    return cls is not None and rest[0] in {**policies.COMMON_KEYS, **cls.KEYS}


_LAT = (between(-90, 90),)
_LON = (between(-180, 360),)
SITE_KEYS = {   # per generator kind: the keys of ``sites = {...}`` (unknown keys are errors)
    "latitude-band": {
        "kind": text(REQUIRED, choices=SITE_KINDS),
        "count": integer(REQUIRED, ge(1), doc="terminals, evenly spread in latitude"),
        "lat_min_deg": Field((int, float), -60.0, _LAT),
        "lat_max_deg": Field((int, float), 60.0, _LAT),
        "lon_deg": Field((int, float), 0.0, _LON),
    },
    "random-region": {
        "kind": text(REQUIRED, choices=SITE_KINDS),
        "count": integer(REQUIRED, ge(1), doc="terminals, uniform in the box (seeded)"),
        "seed": integer(0, ge(0)),
        "lat_min_deg": Field((int, float), -60.0, _LAT),
        "lat_max_deg": Field((int, float), 60.0, _LAT),
        "lon_min_deg": Field((int, float), -180.0, _LON),
        "lon_max_deg": Field((int, float), 180.0, _LON),
    },
    "list": {
        "kind": text(REQUIRED, choices=SITE_KINDS),
        "sites": Field((list,), REQUIRED, (nonempty,), "terminal tables, one per axis value"),
    },
}


def generate_sites(spec: dict, template: dict, source: str, where: str) -> list[list[dict]]:
    """Terminal sets of a ``sites`` generator: each returned set is one axis value."""
    kind = spec.get("kind")
    if kind not in SITE_KINDS:
        raise InputError(source, f"{where}.sites.kind", kind, "must be one of " + ", ".join(SITE_KINDS))
    spec = check_table(spec, SITE_KEYS[kind], source, f"{where}.sites")
    base = {k: v for k, v in template.items() if k not in ("name", "lat_deg", "lon_deg")}
    if kind == "list":
        for i, s in enumerate(spec["sites"]):
            if not isinstance(s, dict):
                raise InputError(source, f"{where}.sites.sites[{i + 1}]", s,
                                 "must be a terminal table")
        return [[{**base, **s}] for s in spec["sites"]]
    count = spec["count"]
    for a, b in (("lat_min_deg", "lat_max_deg"), ("lon_min_deg", "lon_max_deg")):
        if a in spec and spec[a] > spec[b]:
            raise InputError(source, f"{where}.sites.{a}", spec[a], f"must not exceed {b}")
    if kind == "latitude-band":
        lats = np.linspace(float(spec["lat_min_deg"]), float(spec["lat_max_deg"]), count)
        lon = float(spec["lon_deg"])
        return [[{**base, "name": f"lat{lat:+06.1f}", "lat_deg": float(lat), "lon_deg": lon}]
                for lat in lats]
    rng = np.random.default_rng(int(spec["seed"]))
    lat = rng.uniform(float(spec["lat_min_deg"]), float(spec["lat_max_deg"]), count)
    lon = rng.uniform(float(spec["lon_min_deg"]), float(spec["lon_max_deg"]), count)
    return [[{**base, "name": f"site{i + 1:03d}", "lat_deg": float(a), "lon_deg": float(b)}]
            for i, (a, b) in enumerate(zip(lat, lon))]


def _canonical(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, default=str)


def load_sweep(path: str | Path) -> SweepPlan:
    """Read a sweep file, check it and every run's scenario, and expand it."""
    path = Path(path)
    raw = read_toml(path)
    source = str(path)
    for key in raw:
        if key not in ("sweep", "axis", "combination", "overrides"):
            raise InputError(source, key, None, "unknown table (known: sweep, axis, combination, "
                             "overrides)", show_value=False)
    sw = check_table(raw.get("sweep", {}), SWEEP_KEYS, source, "sweep")
    base_path = Path(sw["base"])
    if not base_path.is_absolute():
        base_path = path.resolve().parent / base_path
    if not base_path.is_file():
        raise InputError(source, "sweep.base", sw["base"], f"base scenario not found ({base_path})")
    base_raw = read_toml(base_path)
    base_dir = base_path.resolve().parent
    for head in ("constellation", "terminal", "policy"):
        if isinstance(base_raw.get(head), dict):   # one [table] stands for [[table]]
            base_raw[head] = [base_raw[head]]
        if not isinstance(base_raw.get(head, []), list) or \
                not all(isinstance(t, dict) for t in base_raw.get(head, [])):
            raise InputError(str(base_path), head, None, f"must be one or more [[{head}]] tables",
                             show_value=False)
    overrides = raw.get("overrides", {})
    if not isinstance(overrides, dict):
        raise InputError(source, "overrides", overrides, "must be a table of key = value")
    for k, v in overrides.items():
        apply_override(base_raw, k, v, source, f"overrides.{k}", base_dir)
    axes = []
    axis_tables = raw.get("axis", [])
    if not isinstance(axis_tables, list):
        raise InputError(source, "axis", None, "must be [[axis]] tables", show_value=False)
    for i, t in enumerate(axis_tables):
        where = f"axis[{i + 1}]"
        a = check_table(t, AXIS_KEYS, source, where)
        if a["key"] == "terminal":
            if a["sites"] is None:
                raise InputError(source, f"{where}.sites", None, "a terminal axis needs sites = {...}",
                                 show_value=False)
            template = (base_raw.get("terminal") or [{}])[0]
            vals = generate_sites(a["sites"], template, source, where)
            axes.append(Axis("terminal", vals, [v[0]["name"] for v in vals]))
            continue
        if not a["values"]:
            raise InputError(source, f"{where}.values", a["values"], "must be a non-empty list")
        labels = [float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else v
                  for v in a["values"]]
        axes.append(Axis(a["key"], list(a["values"]), labels))
    plan = SweepPlan(source, base_dir, sw["name"], axes)
    if sw["mode"] == "grid":
        combos = [dict(zip(range(len(axes)), idx))
                  for idx in itertools.product(*[range(len(a.values)) for a in axes])]
    else:
        combos = _list_combos(raw.get("combination", []), axes, source)
    base_policies = [p.get("name") or p.get("rule") for p in base_raw.get("policy", [])]
    for combo in combos:
        scen = copy.deepcopy(base_raw)
        params = {}
        policy_names = list(base_policies)
        for ai, vi in combo.items():
            ax = axes[ai]
            value = ax.values[vi]
            params[ax.key] = ax.labels[vi]
            if ax.key == "terminal":
                scen["terminal"] = copy.deepcopy(value)
            elif ax.key == "policy":
                if value not in base_policies:
                    raise InputError(source, f"axis[{ai + 1}].values", value,
                                     "no such policy in the base (known: " + ", ".join(base_policies) + ")")
                policy_names = [value]
            else:
                apply_override(scen, ax.key, value, source, f"axis[{ai + 1}].key", base_dir)
        scen["policy"] = [p for p in scen.get("policy", [])
                          if (p.get("name") or p.get("rule")) in policy_names]
        if not scen["policy"]:
            raise InputError(source, "axis", None, "a combination selects no policy", show_value=False)
        plan.runs.append(Run(params, scen, policy_names))
    _key_runs(plan)
    plan.notes.extend(_seed_notes(plan, base_raw))
    return plan


def _seed_notes(plan: SweepPlan, base: dict) -> list[str]:
    """Warnings for a sweep over ``scenario.seed`` whose base fixes a seed of its own somewhere
    (a canyon, line of sight, a random constellation): that part then stays the same in every
    run; ``seed = "scenario"`` (or no seed) makes it follow the scenario seed."""
    if not any(a.key == "scenario.seed" for a in plan.axes):
        return []
    fixed = []
    for i, t in enumerate(base.get("constellation", [])):
        if isinstance(t.get("seed"), int):
            fixed.append(f"constellation {t.get('name') or i + 1}")
    for t in base.get("terminal", []):
        for part in ("canyon", "los"):
            sub = t.get(part)
            if isinstance(sub, dict) and isinstance(sub.get("seed"), int):
                fixed.append(f"terminal {t.get('name')} {part}")
    if not fixed:
        return []
    return [f"warning: {plan.source}: the sweep varies scenario.seed, but "
            f"{', '.join(fixed)} {'has' if len(fixed) == 1 else 'have'} a seed of its own and "
            "stays the same in every run (write seed = \"scenario\" to follow the scenario seed)"]


def _list_combos(tables: list, axes: list[Axis], source: str) -> list[dict]:
    out = []
    keys = {a.key: i for i, a in enumerate(axes)}
    for j, t in enumerate(tables):
        combo = {}
        for k, v in t.items():
            if k not in keys:
                raise InputError(source, f"combination[{j + 1}].{k}", v, "not an axis key")
            ax = axes[keys[k]]
            lab = [str(x) for x in ax.labels]
            if str(v if not isinstance(v, (int, float)) else float(v)) not in lab and v not in ax.values:
                raise InputError(source, f"combination[{j + 1}].{k}", v, "not one of the axis values")
            combo[keys[k]] = ax.values.index(v) if v in ax.values else lab.index(str(float(v)))
        out.append(combo)
    if not out:
        raise InputError(source, "[[combination]]", None, "mode = \"list\" needs combination tables",
                         show_value=False)
    return out


def _run_error(plan: SweepPlan, i: int, exc: InputError) -> InputError:
    """One line naming the sweep file, the run (number and parameters) and the problem."""
    inner = str(exc)
    if inner.startswith(plan.source + ": "):     # the run's scenario is named after the sweep
        inner = inner[len(plan.source) + 2:]
    params = ", ".join(f"{k}={v}" for k, v in plan.runs[i].params.items())
    params = params if len(params) <= 120 else params[:117] + "..."
    return InputError(plan.source, f"run {i + 1} ({params})", None, inner, show_value=False)


def _key_runs(plan: SweepPlan) -> None:
    """Check every run's scenario (errors name the sweep file) and give runs and tasks keys.

    Keys hash the resolved configuration with every referenced file (masks, tracks, element
    sets, plug-in rules) replaced by its content's hash, so an edited file gives new keys and a
    resumed sweep never keeps results of the old content.  Plug-ins are not run here: their
    parameters enter the key as written (the same in a dry run and a real one).
    """
    for i, run in enumerate(plan.runs):
        try:
            scen = scenario_from_dict(copy.deepcopy(run.scenario), plan.source, plan.base_dir,
                                      build=False)
        except InputError as exc:
            raise _run_error(plan, i, exc) from None
        resolved = scen.resolved()
        run.key = hashlib.sha256(canonical_config(resolved).encode()).hexdigest()[:16]
        no_policy = {k: v for k, v in resolved.items() if k != "policy"}
        run.task = hashlib.sha256(canonical_config(no_policy).encode()).hexdigest()[:16]
        plan.tasks.setdefault(run.task, []).append(run)
    seen: dict[str, int] = {}
    for i, run in enumerate(plan.runs):
        if run.key in seen:
            raise InputError(plan.source, "axis", None, f"runs {seen[run.key] + 1} and {i + 1} are "
                             "the same scenario (an axis changes nothing?)", show_value=False)
        seen[run.key] = i
    plan.fingerprint = hashlib.sha256(_canonical(
        sorted([r.key, r.params] for r in plan.runs)).encode()).hexdigest()


def _by_policy_name(msg: str, run: Run) -> str:
    """A run's warning with its ``policy[N]`` (an index into the run's own policies, which a
    policy axis narrows) named as the base file names it, so the runs' alike warnings are one."""
    names = [p.get("name") or p.get("rule") for p in run.scenario.get("policy", [])]

    def named(m: re.Match) -> str:
        i = int(m.group(1)) - 1
        return f'policy "{names[i]}"' if 0 <= i < len(names) else m.group(0)
    return re.sub(r"policy\[(\d+)\]", named, msg)


def check_runs(plan: SweepPlan, *, load_plugins: bool,
               warn: Callable[[str], None] | None = None,
               each: Callable[[Any, int], None] | None = None) -> None:
    """Check every run as ``dwell run`` would before any starts: referenced files read and
    checked, cross-key rules (e.g. Walker T divisible by P), constellation and sites built, and
    with ``load_plugins`` the plug-in rules loaded and their parameters checked.  ``each(scen,
    n_policies)`` may add checks per task before anything is built (the memory estimate).
    Raises one InputError naming the sweep file, the run and the problem.

    Cost: one build per distinct constellation and per distinct terminal set (cached by their
    resolved tables), so a sweep of policy or seed values builds once.
    """
    from ..io.config import build_constellation
    from ..obstruction import build_site

    quiet = warn or (lambda msg: None)
    built_consts: dict[str, Any] = {}
    built_sites: dict[str, Any] = {}
    index = {id(r): i for i, r in enumerate(plan.runs)}
    for task, runs in plan.tasks.items():
        for run in runs:       # each run's policies (plug-ins loaded when asked)
            try:
                scenario_from_dict(copy.deepcopy(run.scenario), plan.source, plan.base_dir,
                                   build=False, load_plugins=load_plugins,
                                   warn=lambda msg, run=run: quiet(_by_policy_name(msg, run)))
            except InputError as exc:
                raise _run_error(plan, index[id(run)], exc) from None
        i = index[id(runs[0])]
        try:
            scen = scenario_from_dict(copy.deepcopy(runs[0].scenario), plan.source,
                                      plan.base_dir, build=False)
            if each is not None:
                each(scen, sum(len(r.scenario["policy"]) for r in runs))
            sc = scen.scenario
            const_key = canonical_config({"c": scen.constellations, "start": sc["start"],
                                          "seed": sc["seed"]})
            if const_key not in built_consts:
                built_consts[const_key] = build_constellation(scen, quiet)
            scen.constellation = built_consts[const_key]
            for k, t in enumerate(scen.terminals):
                site_key = canonical_config({"t": t, "k": k, "start": sc["start"],
                                             "duration_s": sc["duration_s"], "seed": sc["seed"]})
                if site_key not in built_sites:
                    built_sites[site_key] = build_site(t, scen, k, quiet)
                scen.sites.append(built_sites[site_key])
        except InputError as exc:
            raise _run_error(plan, i, exc) from None
