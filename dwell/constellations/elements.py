"""Element-set files: TLE (two- or three-line) and CCSDS OMM (XML or CSV), parsed by ``sgp4``.

Errors name the file and line (TLE) or record (OMM).  Element sets whose epochs lie far apart
are accepted with a warning: SGP4 accuracy decays with distance from epoch.
"""

from __future__ import annotations

import math
from pathlib import Path

from sgp4 import omm
from sgp4.api import WGS72, Satrec
from sgp4.io import verify_checksum

from ..io.errors import InputError
from ..io.schema import REQUIRED, Field, gt, text
from .base import BuildContext, Satellite, Source, from_satrec

EPOCH_SPREAD_WARN_DAYS = 30.0

TLE_KEYS = {
    "path": text(REQUIRED, doc="element file, relative to the config file"),
    "epoch_spread_warn_days": Field((int, float), EPOCH_SPREAD_WARN_DAYS, (gt(0),),
                                    "warn when epochs span more than this"),
}
OMM_KEYS = dict(TLE_KEYS)
OMM_KEYS["format"] = text("auto", choices=("auto", "xml", "csv"),
                          doc="auto: by the file ending (.xml or .csv)")


def _resolve(params: dict, ctx: BuildContext) -> Path:
    path = Path(params["path"])
    if not path.is_absolute():
        path = ctx.base_dir / path
    if not path.is_file():
        raise InputError(ctx.source, f"{ctx.where}.path", params["path"], "file not found")
    return path


def _read_text(path: Path, ctx: BuildContext) -> str:
    try:
        return path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise InputError(str(path), None, None, "not UTF-8 text") from None
    except OSError as exc:
        raise InputError(str(path), None, None,
                         f"cannot read: {exc.strerror or type(exc).__name__}") from None


# Numeric fields of the two element lines, 1-based inclusive columns (Hoots & Roehrich,
# Spacetrack Report No. 3, 1980, and the usual two-line layout; from memory).  Each holds digits,
# blanks, signs and a decimal point only; a letter there is read by the C parser as the end of
# the number, silently, so it is refused here.  The catalogue number may start with a letter
# (the "alpha-5" extension), the designator and classification are text.
_NUMERIC = "0123456789 +-."
TLE_FIELDS = {
    "1": ((3, 7, "catalogue number", True), (19, 32, "epoch", False),
          (34, 43, "first derivative of mean motion", False),
          (45, 52, "second derivative of mean motion", False), (54, 61, "BSTAR drag term", False),
          (63, 63, "ephemeris type", False), (65, 68, "element set number", False)),
    "2": ((3, 7, "catalogue number", True), (9, 16, "inclination", False),
          (18, 25, "right ascension of the ascending node", False),
          (27, 33, "eccentricity", False), (35, 42, "argument of perigee", False),
          (44, 51, "mean anomaly", False), (53, 63, "mean motion", False),
          (64, 68, "revolution number", False)),
}


def _check_fields(line: str, number: int, file: str) -> None:
    for a, b, what, alpha_first in TLE_FIELDS[line[0]]:
        cells = line[a - 1:b]
        if alpha_first and cells[:1].isalpha() and cells[:1].isupper():
            cells = cells[1:]
        if any(c not in _NUMERIC for c in cells):
            raise InputError(file, f"line {number}, columns {a}-{b} ({what})", None,
                             "must hold digits, blanks, signs and a decimal point only",
                             show_value=False)


def parse_tle_text(body: str, file: str) -> list[tuple[str | None, str, str, int]]:
    """Split a TLE/3LE file into (name, line1, line2, line number of line1); checks each line.

    Errors name the file, the line (and columns) with a reason; they never repeat the line."""
    lines = [(i + 1, ln.rstrip()) for i, ln in enumerate(body.splitlines())]
    lines = [(n, ln) for n, ln in lines if ln.strip()]
    out = []
    i = 0
    while i < len(lines):
        n, ln = lines[i]
        name = None
        if not ln.startswith("1 "):
            if ln.startswith("2 "):
                raise InputError(file, f"line {n}", None, "line 2 without a line 1 before it",
                                 show_value=False)
            name = ln[2:].strip() if ln.startswith("0 ") else ln.strip()
            i += 1
            if i >= len(lines):
                raise InputError(file, f"line {n}", None, "name line without element lines",
                                 show_value=False)
            n, ln = lines[i]
        if i + 1 >= len(lines):
            raise InputError(file, f"line {n}", None, "line 1 without a line 2 after it",
                             show_value=False)
        n2, ln2 = lines[i + 1]
        for num, line, first in ((n, ln, "1 "), (n2, ln2, "2 ")):
            if not line.startswith(first):
                raise InputError(file, f"line {num}", None, f"expected a line starting '{first}'",
                                 show_value=False)
            if len(line) != 69:
                raise InputError(file, f"line {num}", None,
                                 f"element lines have 69 characters, this has {len(line)}",
                                 show_value=False)
            try:
                verify_checksum(line)
            except ValueError:
                raise InputError(file, f"line {num}", None,
                                 f"bad checksum (last digit should be {_checksum(line)})",
                                 show_value=False) from None
            _check_fields(line, num, file)
        if ln[2:7] != ln2[2:7]:
            raise InputError(file, f"line {n2}", None, "catalogue number differs from its line 1",
                             show_value=False)
        out.append((name, ln, ln2, n))
        i += 2
    if not out:
        raise InputError(file, None, None, "no element sets found")
    return out


def _checksum(line: str) -> int:
    from sgp4.io import compute_checksum
    return compute_checksum(line)


def _warn_spread(sats: list[Satrec], params: dict, file: str, ctx: BuildContext) -> None:
    epochs = [s.jdsatepoch + s.jdsatepochF for s in sats]
    spread = max(epochs) - min(epochs)
    if spread > params["epoch_spread_warn_days"]:
        ctx.warn(f"warning: {file}: element epochs span {spread:.1f} days; SGP4 accuracy falls "
                 "with distance from epoch")


def _unique(names: list[str]) -> list[str]:
    seen: dict[str, int] = {}
    out = []
    for n in names:
        seen[n] = seen.get(n, 0) + 1
        out.append(n if seen[n] == 1 else f"{n}#{seen[n]}")
    return out


def _duplicates(keys: list[tuple[str, str]], where: list[str], file: str,
                ctx: BuildContext) -> None:
    """Refuse an element set listed twice; warn when one catalogue number has several sets.

    ``keys`` are (catalogue number, elements) per set, ``where`` names each set ("line 4").
    Two identical sets would simulate one satellite as two, co-located; several epochs of one
    satellite (a history file) would simulate it as several satellites, which is rarely meant.
    """
    first_of: dict[tuple[str, str], str] = {}
    by_number: dict[str, list[str]] = {}
    for key, at in zip(keys, where):
        if key in first_of:
            raise InputError(file, at, None, f"the same element set as {first_of[key]} (a "
                             "satellite listed twice would be simulated twice)", show_value=False)
        first_of[key] = at
        by_number.setdefault(key[0], []).append(at)
    for number, places in by_number.items():
        if len(places) > 1:
            ctx.warn(f"warning: {file}: catalogue number {number} has {len(places)} element "
                     f"sets ({', '.join(places[:4])}{', ...' if len(places) > 4 else ''}); each "
                     "is simulated as a satellite of its own")


def _tle(params: dict, ctx: BuildContext) -> list[Satellite]:
    path = _resolve(params, ctx)
    records = parse_tle_text(_read_text(path, ctx), str(path))
    # elements: line 1 columns 19-61 (epoch, drag terms) and line 2 columns 9-63 (the orbit)
    _duplicates([(l1[2:7], l1[18:61] + l2[8:63]) for _, l1, l2, _ in records],
                [f"line {n}" for *_, n in records], str(path), ctx)
    sats, names = [], []
    for name, l1, l2, n in records:
        sat = Satrec.twoline2rv(l1, l2, WGS72)
        if sat.error:
            raise InputError(str(path), f"line {n}", None, f"SGP4 rejects this element set "
                             f"(error {sat.error})", show_value=False)
        sats.append(sat)
        names.append(name or f"{params['name']}-{sat.satnum}")
    _warn_spread(sats, params, str(path), ctx)
    return [from_satrec(nm, params["name"], s) for nm, s in zip(_unique(names), sats)]


_OMM_REQUIRED = ("EPOCH", "MEAN_MOTION", "ECCENTRICITY", "INCLINATION", "RA_OF_ASC_NODE",
                 "ARG_OF_PERICENTER", "MEAN_ANOMALY", "NORAD_CAT_ID", "BSTAR")
# Ranges of the mean elements (CCSDS 502.0-B-2 gives the units: rev/day and degrees; the ranges
# are those of a closed orbit: eccentricity in [0, 1), inclination in [0, 180] deg, mean motion
# > 0; common practice).  (low, high, high included)
_OMM_RANGES = {"MEAN_MOTION": (0.0, math.inf, False), "ECCENTRICITY": (0.0, 1.0, False),
               "INCLINATION": (0.0, 180.0, True)}
_OMM_REALS = ("MEAN_MOTION", "ECCENTRICITY", "INCLINATION", "RA_OF_ASC_NODE",
              "ARG_OF_PERICENTER", "MEAN_ANOMALY", "BSTAR", "MEAN_MOTION_DOT", "MEAN_MOTION_DDOT")
_OMM_INTEGERS = ("NORAD_CAT_ID", "ELEMENT_SET_NO", "REV_AT_EPOCH", "EPHEMERIS_TYPE")
_OMM_ELEMENTS = ("EPOCH",) + _OMM_REALS


def _check_omm_numbers(fields: dict, file: str, k: int) -> None:
    """Every numeric field a finite number in its range; the message names record and field."""
    for key in _OMM_REALS:
        try:
            value = float(fields[key])
        except (TypeError, ValueError):
            value = math.nan
        if not math.isfinite(value):
            raise InputError(file, f"record {k}.{key}", None, "must be a finite number",
                             show_value=False)
        if key in _OMM_RANGES:
            lo, hi, hi_in = _OMM_RANGES[key]
            ok = (value > lo if key == "MEAN_MOTION" else value >= lo) and \
                (value <= hi if hi_in else value < hi)
            if not ok:
                span = "> 0" if key == "MEAN_MOTION" else f"in {lo:g}..{hi:g}" + \
                    ("" if hi_in else f" ({hi:g} excluded)")
                raise InputError(file, f"record {k}.{key}", value, f"must be {span}")
    for key in _OMM_INTEGERS:
        try:
            int(fields[key])
        except (TypeError, ValueError):
            raise InputError(file, f"record {k}.{key}", None, "must be a whole number",
                             show_value=False) from None


_OMM_DEFAULTS = {"CLASSIFICATION_TYPE": "U", "OBJECT_ID": "", "EPHEMERIS_TYPE": "0",
                 "ELEMENT_SET_NO": "0", "REV_AT_EPOCH": "0", "MEAN_MOTION_DOT": "0",
                 "MEAN_MOTION_DDOT": "0"}


def _omm(params: dict, ctx: BuildContext) -> list[Satellite]:
    path = _resolve(params, ctx)
    fmt = params["format"]
    if fmt == "auto":
        fmt = {".xml": "xml", ".csv": "csv"}.get(path.suffix.lower())
        if fmt is None:
            raise InputError(ctx.source, f"{ctx.where}.path", params["path"],
                             "cannot tell OMM format from the ending; set format = \"xml\" or \"csv\"")
    try:
        with path.open(encoding="utf-8-sig", newline="") as fh:
            records = list(omm.parse_xml(fh) if fmt == "xml" else omm.parse_csv(fh))
    except Exception as exc:  # the XML parser raises its own types
        where = getattr(exc, "position", None)     # ElementTree: (line, column)
        at = f" at line {where[0]}, column {where[1]}" if where else ""
        raise InputError(str(path), None, None,
                         f"cannot parse OMM {fmt}{at} ({type(exc).__name__})") from None
    sats, names, keys = [], [], []
    for k, fields in enumerate(records, start=1):
        fields = {key: (val.strip() if isinstance(val, str) else val) for key, val in fields.items()
                  if key is not None}
        for key in _OMM_REQUIRED:
            if not fields.get(key):
                raise InputError(str(path), f"record {k}.{key}", None, "missing",
                                 show_value=False)
        for key, val in _OMM_DEFAULTS.items():
            if not fields.get(key):
                fields[key] = val
        if "." not in fields["EPOCH"]:
            fields["EPOCH"] += ".0"  # sgp4's OMM reader wants fractional seconds
        _check_omm_numbers(fields, str(path), k)
        sat = Satrec()
        try:
            omm.initialize(sat, fields, WGS72)
        except (ValueError, KeyError, TypeError, OverflowError) as exc:
            # the reader's message may quote the field: name the kind of failure only
            raise InputError(str(path), f"record {k}", None, "sgp4's OMM reader refuses it "
                             f"({type(exc).__name__}; check EPOCH and the integer fields)",
                             show_value=False) from None
        if sat.error:
            raise InputError(str(path), f"record {k}", None,
                             f"SGP4 rejects this element set (error {sat.error})",
                             show_value=False)
        keys.append((str(int(fields["NORAD_CAT_ID"])),
                     "|".join(str(fields[f]) for f in _OMM_ELEMENTS)))
        sats.append(sat)
        names.append(fields.get("OBJECT_NAME") or f"{params['name']}-{sat.satnum}")
    if not sats:
        raise InputError(str(path), None, None, "no OMM records found")
    _duplicates(keys, [f"record {k}" for k in range(1, len(keys) + 1)], str(path), ctx)
    _warn_spread(sats, params, str(path), ctx)
    return [from_satrec(nm, params["name"], s) for nm, s in zip(_unique(names), sats)]


TLE = Source(TLE_KEYS, _tle)
OMM = Source(OMM_KEYS, _omm)
