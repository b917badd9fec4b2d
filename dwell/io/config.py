"""Scenario files (TOML): read, check every table, resolve defaults, build the constellation.

Top-level tables (the key names are a contract: later versions add keys, never rename them):

- ``[scenario]``: ``start`` (ISO-8601 UTC), ``duration_s``, and optional engine settings;
- ``[[constellation]]``: one or more sources (see :mod:`dwell.constellations`);
- ``[[terminal]]``: ground terminals, one table each;
- ``[[area]]``: regions that generate terminals (see :mod:`dwell.io.areas`); a scenario needs
  at least one ``[[terminal]]`` or ``[[area]]``;
- ``[[policy]]`` and ``[link]``: serving policies and the link budget (see :mod:`dwell.policies`,
  :mod:`dwell.radio.link`).

:func:`load_scenario` checks everything a run will read (element files, masks, tracks) before any
work starts, and raises :class:`~dwell.errors.InputError` naming the file, key and value.
"""

from __future__ import annotations

import copy
import functools
import hashlib
import json
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

from .. import obstruction, policies
from ..constellations import SOURCES, BuildContext, Constellation
from ..orbits.timebase import Epoch, parse_utc
from ..radio import beams, hardware, link
from . import areas as area_mod
from .errors import InputError
from .schema import (
    REQUIRED,
    Field,
    between,
    check_table,
    flag,
    follow_scenario,
    ge,
    label,
    gt,
    le,
    number,
    text,
)

PATH_KEYS = ("path", "mask", "track")  # keys whose values are files relative to the config


# Vallado's Julian-date algorithm (sgp4.api.jday) holds for 1900..2100 (Vallado, Fundamentals
# of Astrodynamics and Applications, algorithm 14; from memory); TLE epochs name years 1957-2056.
FIRST_YEAR, LAST_YEAR = 1900, 2099


def _utc(value: Any) -> str | None:
    try:
        moment = parse_utc(value)
    except ValueError as exc:
        return str(exc)
    if not FIRST_YEAR <= moment.year <= LAST_YEAR:
        return f"must lie in the years {FIRST_YEAR}..{LAST_YEAR} (Julian dates of SGP4)"
    return None


SCENARIO_KEYS: dict[str, Field] = {
    "start": Field((str,), REQUIRED, (_utc,), "scenario start, ISO-8601 UTC"),
    "duration_s": number(REQUIRED, gt(0), le(366 * 86400), doc="scenario length"),
    "name": label("scenario", doc="label carried into the outputs (default: the config "
                  "file's name without its extension)"),
    "seed": Field((int,), 0, (ge(0),), "seed for every stochastic part of the run"),
    "earth_rotation": flag(True, doc="false freezes the Earth (analytic studies)"),
    "earth": text("wgs84", choices=("wgs84", "sphere"),
                  doc="sites on the WGS-84 ellipsoid, or on the 6371 km sphere that analytic "
                      "formulas use (up = radial)"),
    "ut1_utc_s": number(0.0, between(-1.0, 1.0), doc="UT1-UTC used for sidereal time"),
    "measurement_period_s": number(1.0, gt(0), le(60), doc="terminal measurement cycle"),
    "propagation_step_s": Field((int, float), None, (gt(0), le(3600)),
                                "SGP4 sample spacing; default: from the shortest orbit period"),
    "chunk_s": number(21600.0, ge(600), doc="geometry is computed in chunks of this length"),
    "refine_s": number(0.01, gt(0), le(0.05), doc="rise/set times are refined to this"),
    "release": Field((int,), 17, (), "3GPP release the mobility procedures follow (17: NTN "
                     "conditional handover with T1/D1; 18 adds D2)", choices=(17, 18)),
}

TERMINAL_KEYS: dict[str, Field] = {
    "name": label(REQUIRED, doc="label, unique in the scenario"),
    "lat_deg": number(REQUIRED, between(-90, 90), doc="WGS-84 geodetic latitude"),
    "lon_deg": number(REQUIRED, between(-180, 360), doc="longitude, east positive"),
    "alt_m": number(0.0, between(-500, 100000), doc="height above the WGS-84 ellipsoid"),
    "min_elevation_deg": number(25.0, between(-5, 90), doc="elevation floor of the terminal"),
    **obstruction.TERMINAL_KEYS,
    **hardware.TERMINAL_KEYS,
}

CONSTELLATION_COMMON = {
    "kind": text(REQUIRED, choices=tuple(SOURCES), doc="source kind"),
    "name": label(None, doc="label; satellites are named after it"),
    "beams": Field((dict,), None, (), "beam layout of these satellites (see dwell.radio.beams)"),
}

TOP_LEVEL = ("scenario", "constellation", "terminal", "policy", "link", "area")


@dataclass
class Scenario:
    """A checked scenario: resolved tables plus the objects built from them."""

    source: str
    base_dir: Path
    scenario: dict[str, Any]
    constellations: list[dict[str, Any]]
    terminals: list[dict[str, Any]]
    policies: list[dict[str, Any]]
    link: dict[str, Any]
    constellation: Constellation = field(default_factory=Constellation)
    layouts: list[Any] = field(default_factory=list)   # dwell.radio.beams.BeamLayout per table
    epoch: Epoch | None = None
    sites: list[Any] = field(default_factory=list)   # dwell.obstruction.Site per terminal
    areas: list[dict[str, Any]] = field(default_factory=list)   # checked [[area]] tables
    population: Any = None       # dwell.io.areas.Population of the generated terminals

    def resolved(self) -> dict[str, Any]:
        """The fully resolved configuration (defaults filled, paths absolute, no nulls).

        With areas it holds the ``[[area]]`` tables and the listed terminals only: the
        generated terminals follow from the areas and the scenario seed."""
        listed = self.terminals
        if self.areas:
            listed = self.terminals[:self.population.first_index]
        out = {"scenario": self.scenario, "constellation": self.constellations,
               "terminal": listed, "policy": self.policies, "link": self.link}
        if self.areas:
            if not listed:
                del out["terminal"]
            out["area"] = self.areas
        return _drop_none(copy.deepcopy(out))

    def config_hash(self) -> str:
        """sha256 of the resolved config, with referenced files hashed by content, not path."""
        return hashlib.sha256(_canonical(self.resolved()).encode()).hexdigest()

    @property
    def seed(self) -> int:
        return int(self.scenario["seed"])

    def terminal_names(self) -> list[str]:
        return [t["name"] for t in self.terminals]


def _resolve_cell_origins(consts: list[dict], terms: list[dict]) -> None:
    """Earth-fixed cell lattices default to the terminals' mean position (the centroid of
    their unit vectors), written into the table so the resolved config states it."""
    import numpy as np

    lat = np.radians([t["lat_deg"] for t in terms])
    lon = np.radians([t["lon_deg"] for t in terms])
    vec = np.stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)]).sum(axis=1)
    norm = float(np.linalg.norm(vec))
    lat0 = math.degrees(math.asin(vec[2] / norm)) if norm > 1e-9 else 0.0
    lon0 = math.degrees(math.atan2(vec[1], vec[0])) if norm > 1e-9 else 0.0
    for c in consts:
        b = c["beams"]
        if b["cell_mode"] == "earth-fixed" and b["cell_origin_lat_deg"] is None:
            b["cell_origin_lat_deg"] = round(lat0, 9)
            b["cell_origin_lon_deg"] = round(lon0, 9)


def _drop_none(obj: Any) -> Any:
    if isinstance(obj, dict):
        return {k: _drop_none(v) for k, v in obj.items() if v is not None}
    if isinstance(obj, list):
        return [_drop_none(v) for v in obj]
    return obj


def canonical_config(resolved: dict) -> str:
    """A resolved configuration as canonical JSON, referenced files (masks, tracks, element
    sets, plug-in rules) replaced by the sha256 of their content: equal texts mean equal runs
    wherever the files live, and an edited file changes the text.  Reads every such file."""
    return _canonical(resolved)


def _canonical(resolved: dict) -> str:
    def walk(obj: Any, key: str = "") -> Any:
        if isinstance(obj, dict):
            return {k: walk(v, k) for k, v in sorted(obj.items())}
        if isinstance(obj, list):
            return [walk(v, key) for v in obj]
        if key in PATH_KEYS and isinstance(obj, str) and Path(obj).is_file():
            return "sha256:" + _file_digest(obj)
        if key == "rule" and policies.is_plugin(obj):       # a plug-in: its code, not its path
            file, cls = obj.split(":", 1)
            if Path(file).is_file():
                return "sha256:" + _file_digest(file) + ":" + cls
        return obj
    return json.dumps(walk(resolved), sort_keys=True, default=str)


def _file_digest(path: str) -> str:
    """sha256 of a file's content, read once per (path, modification time, size): a sweep
    keys many runs on the same element file."""
    st = Path(path).stat()
    return _digest(str(Path(path).resolve()), st.st_mtime_ns, st.st_size)


@functools.lru_cache(maxsize=256)
def _digest(path: str, mtime_ns: int, size: int) -> str:
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def read_toml(path: Path) -> dict[str, Any]:
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(str(path), None, None, f"cannot read: {exc.strerror or exc}") from None
    try:
        # a byte-order mark is allowed at the start of UTF-8 text (RFC 3629 section 6), as the
        # CSV and element-file readers already accept
        return tomllib.loads(data.decode("utf-8-sig"))
    except UnicodeDecodeError:
        raise InputError(str(path), None, None, "not UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        where, reason = _toml_position(str(exc))
        raise InputError(str(path), where, None, reason, show_value=False) from None


def _toml_position(message: str) -> tuple[str | None, str]:
    """(where, reason) of a TOML parse error: the line and column it names, and its
    reason with any quoted key of the file left out (errors never repeat the file's text)."""
    m = re.search(r"\(at line (\d+), column (\d+)\)", message)
    where = f"line {m.group(1)}, column {m.group(2)}" if m else None
    reason = re.sub(r"\s*\(at [^)]*\)", "", message)
    # tomllib quotes keys as ('a', 'b') and single characters as '=': keep the latter only
    reason = re.sub(r"\((?:'[^']*'(?:, )?)+,?\)|'[^']{2,}'|\"[^\"]{2,}\"", "a key", reason)
    return where, f"not valid TOML ({reason.strip()})"


def load_scenario(path: str | Path, *, warn: Callable[[str], None] | None = None,
                  build: bool = True, load_plugins: bool = False,
                  policy_warnings: bool = True) -> Scenario:
    """Read and check a scenario file; with ``build`` also build satellites and sites.

    Plug-in rule files are Python code: they run only with ``load_plugins`` (commands that run
    policies); otherwise their files must exist and their parameters stay unchecked.  Commands
    that run no policy pass ``policy_warnings = False``: the policies are still checked, but
    warnings about their timing would only distract there."""
    path = Path(path)
    raw = read_toml(path)
    if isinstance(raw.get("scenario"), dict) and "name" not in raw["scenario"]:
        # a run is labelled after its file unless it says otherwise ("scenario" says nothing)
        raw["scenario"] = {**raw["scenario"], "name": path.stem or "scenario"}
    return scenario_from_dict(raw, str(path), path.resolve().parent, warn=warn, build=build,
                              load_plugins=load_plugins, policy_warnings=policy_warnings)


def _array_of_tables(raw: dict, key: str, source: str, required: bool) -> list[dict]:
    value = raw.get(key, [])
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise InputError(source, key, value, f"must be one or more [[{key}]] tables")
    if required and not value:
        raise InputError(source, f"[[{key}]]", None, "at least one table is required",
                         show_value=False)
    return value


def _absolute(params: dict, base_dir: Path, source: str = "", where: str = "") -> None:
    """Make file references absolute (relative ones are relative to the config's folder)."""
    for key in PATH_KEYS:
        if isinstance(params.get(key), str):
            params[key] = _absolute_path(params[key], base_dir, source, f"{where}.{key}")
    rule = params.get("rule")
    if isinstance(rule, str) and ":" in rule and rule.split(":", 1)[0].endswith(".py"):
        file, cls = rule.split(":", 1)
        params["rule"] = _absolute_path(file, base_dir, source, f"{where}.rule") + ":" + cls


def _absolute_path(value: str, base_dir: Path, source: str, where: str) -> str:
    if "\x00" in value:
        raise InputError(source, where, value, "a file path must not contain a NUL character")
    try:
        p = Path(value)
        return str(p if p.is_absolute() else (base_dir / p).resolve())
    except (ValueError, OSError) as exc:
        raise InputError(source, where, value, f"not a usable file path ({exc})") from None


def scenario_from_dict(raw: dict[str, Any], source: str, base_dir: Path, *,
                       warn: Callable[[str], None] | None = None, build: bool = True,
                       load_plugins: bool = False, policy_warnings: bool = True) -> Scenario:
    """Check a decoded scenario; ``source`` names the file in error messages (see
    :func:`load_scenario` for ``build``, ``load_plugins`` and ``policy_warnings``)."""
    warn = warn or (lambda msg: None)
    policy_warn = warn if policy_warnings else (lambda msg: None)
    for key, value in raw.items():
        if key not in TOP_LEVEL:
            raise InputError(source, key, value if not isinstance(value, (dict, list)) else None,
                             "unknown table (known: " + ", ".join(TOP_LEVEL) + ")",
                             show_value=not isinstance(value, (dict, list)))
    if "scenario" not in raw:
        raise InputError(source, "[scenario]", None, "missing table", show_value=False)
    scen = check_table(raw["scenario"], SCENARIO_KEYS, source, "scenario")
    scen["start"] = parse_utc(scen["start"]).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    epoch = Epoch(parse_utc(scen["start"]))
    if scen["measurement_period_s"] > scen["duration_s"]:
        raise InputError(source, "scenario.measurement_period_s", scen["measurement_period_s"],
                         "must not exceed duration_s")

    link_params = link.check_table(raw.get("link", {}), source, warn)
    consts = []
    for i, table in enumerate(_array_of_tables(raw, "constellation", source, True)):
        where = f"constellation[{i + 1}]"
        kind = table.get("kind")
        if not isinstance(kind, str) or kind not in SOURCES:
            check_table({"kind": kind} if kind is not None else {}, CONSTELLATION_COMMON,
                        source, where)
        spec = {**CONSTELLATION_COMMON, **SOURCES[kind].keys}
        params = check_table(table, spec, source, where)
        params["beams"] = beams.check_table(params["beams"], link_params, source, where)
        follow_scenario(params)                 # seed = "scenario": as if absent
        if params["name"] is None:
            params["name"] = f"{kind.replace('-', '')}{i + 1}"
        _absolute(params, base_dir, source, where)
        consts.append(params)

    terms = []
    names: set[str] = set()
    area_tables = _array_of_tables(raw, "area", source, False)
    for i, table in enumerate(_array_of_tables(raw, "terminal", source, not area_tables)):
        where = f"terminal[{i + 1}]"
        params = check_table(table, TERMINAL_KEYS, source, where)
        if params["name"] in names:
            raise InputError(source, f"{where}.name", params["name"], "duplicate terminal name")
        names.add(params["name"])
        obstruction.check_terminal(params, source, where)
        hardware.check_terminal(params, source, where)
        _absolute(params, base_dir, source, where)
        terms.append(params)

    def check_template(params: dict, where: str) -> None:
        obstruction.check_terminal(params, source, where)
        hardware.check_terminal(params, source, where)
        _absolute(params, base_dir, source, where)

    area_params, population = [], None
    if area_tables:
        area_params, generated, population = area_mod.expand(
            area_tables, TERMINAL_KEYS, int(scen["seed"]), source, names, len(terms),
            check_template)
        terms.extend(generated)

    if link_params["interference"] is None:   # resolved, so run.toml says which
        link_params["interference"] = any(c["beams"]["layout"] != "single" for c in consts)
    _resolve_cell_origins(consts, terms)
    pols = policies.check_tables(_array_of_tables(raw, "policy", source, False), source,
                                 policy_warn, base_dir, load_plugins=load_plugins)
    for i, params in enumerate(pols):
        _absolute(params, base_dir, source, f"policy[{i + 1}]")
        policies.Policy.check_timing(params, float(scen["measurement_period_s"]), source,
                                     f"policy[{i + 1}]", policy_warn)
    from ..policies.cho import ConditionalHandover
    for i, params in enumerate(pols):
        if params.get("rule") == "cho":
            ConditionalHandover.check_release(params, int(scen["release"]), source,
                                              f"policy[{i + 1}]", policy_warn)
            moving = any(c["beams"]["layout"] != "single" and
                         c["beams"]["cell_mode"] == "earth-moving" for c in consts)
            ConditionalHandover.check_cell_mode(params, moving, source, f"policy[{i + 1}]",
                                                policy_warn)
    from ..policies.base import ping_pong_warning
    msg = ping_pong_warning(pols, float(scen["measurement_period_s"]), source)
    if msg:
        policy_warn(msg)

    out = Scenario(source, base_dir, scen, consts, terms, pols, link_params, epoch=epoch,
                   areas=area_params, population=population)
    out.layouts = [beams.BeamLayout.from_params(c["beams"]) for c in consts]
    if build:
        build_scenario(out, warn)
    return out


def build_scenario(scen: Scenario, warn: Callable[[str], None] | None = None) -> Scenario:
    """Build a checked scenario's satellites and sites (reads element files, masks, tracks;
    generates canyons).  Returns the same object.  Cost: one SGP4 initialisation per satellite
    and each site's files or generated buildings (see dwell.io.estimate for how much)."""
    warn = warn or (lambda msg: None)
    scen.constellation = build_constellation(scen, warn)
    for i, c in enumerate(scen.constellations):
        alts = [s.altitude_km for s in scen.constellation.satellites if s.table == i]
        beams.check_against_orbit(c["beams"], min(alts) if alts else math.nan, scen.source,
                                  f"constellation[{i + 1}]")
    scen.sites = [obstruction.build_site(t, scen, i, warn) for i, t in enumerate(scen.terminals)]
    return scen


def build_constellation(scen: Scenario, warn: Callable[[str], None]) -> Constellation:
    """Build every ``[[constellation]]`` table in order into one constellation."""
    sats = []
    for i, params in enumerate(scen.constellations):
        ctx = BuildContext(scen.source, f"constellation[{i + 1}]", scen.base_dir,
                           scen.epoch.sgp4_epoch_days(), len(sats), warn=warn, seed=scen.seed,
                           index=i)
        built = SOURCES[params["kind"]].build(params, ctx)
        for s in built:
            s.table = i
        sats.extend(built)
    seen: dict[str, int] = {}
    for s in sats:  # names must be unique across tables too
        seen[s.name] = seen.get(s.name, 0) + 1
        if seen[s.name] > 1:
            s.name = f"{s.name}#{seen[s.name]}"
    return Constellation(sats)
