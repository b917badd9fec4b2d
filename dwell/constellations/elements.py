"""Element-set files: TLE (two- or three-line) and CCSDS OMM (XML or CSV), parsed by ``sgp4``.

Errors name the file and line (TLE) or record (OMM).  Element sets whose epochs lie far apart
are accepted with a warning: SGP4 accuracy decays with distance from epoch.
"""

from __future__ import annotations

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
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(str(path), None, None, f"cannot read: {exc}") from None


def parse_tle_text(body: str, file: str) -> list[tuple[str | None, str, str, int]]:
    """Split a TLE/3LE file into (name, line1, line2, line number of line1); checks each line."""
    lines = [(i + 1, ln.rstrip()) for i, ln in enumerate(body.splitlines())]
    lines = [(n, ln) for n, ln in lines if ln.strip()]
    out = []
    i = 0
    while i < len(lines):
        n, ln = lines[i]
        name = None
        if not ln.startswith("1 "):
            if ln.startswith("2 "):
                raise InputError(file, f"line {n}", ln, "line 2 without a line 1 before it")
            name = ln[2:].strip() if ln.startswith("0 ") else ln.strip()
            i += 1
            if i >= len(lines):
                raise InputError(file, f"line {n}", ln, "name line without element lines")
            n, ln = lines[i]
        if i + 1 >= len(lines):
            raise InputError(file, f"line {n}", ln, "line 1 without a line 2 after it")
        n2, ln2 = lines[i + 1]
        for num, line, first in ((n, ln, "1 "), (n2, ln2, "2 ")):
            if not line.startswith(first):
                raise InputError(file, f"line {num}", line, f"expected a line starting '{first}'")
            if len(line) != 69:
                raise InputError(file, f"line {num}", line,
                                 f"element lines have 69 characters, this has {len(line)}")
            try:
                verify_checksum(line)
            except ValueError:
                raise InputError(file, f"line {num}", line,
                                 f"bad checksum (last digit should be {_checksum(line)})") from None
        if ln[2:7] != ln2[2:7]:
            raise InputError(file, f"line {n2}", ln2, "catalogue number differs from its line 1")
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


def _tle(params: dict, ctx: BuildContext) -> list[Satellite]:
    path = _resolve(params, ctx)
    records = parse_tle_text(_read_text(path, ctx), str(path))
    sats, names = [], []
    for name, l1, l2, n in records:
        sat = Satrec.twoline2rv(l1, l2, WGS72)
        if sat.error:
            raise InputError(str(path), f"line {n}", l1, f"SGP4 rejects this element set "
                             f"(error {sat.error})")
        sats.append(sat)
        names.append(name or f"{params['name']}-{sat.satnum}")
    _warn_spread(sats, params, str(path), ctx)
    return [from_satrec(nm, params["name"], s) for nm, s in zip(_unique(names), sats)]


_OMM_REQUIRED = ("EPOCH", "MEAN_MOTION", "ECCENTRICITY", "INCLINATION", "RA_OF_ASC_NODE",
                 "ARG_OF_PERICENTER", "MEAN_ANOMALY", "NORAD_CAT_ID", "BSTAR")
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
        raise InputError(str(path), None, None, f"cannot parse OMM {fmt}: {exc}") from None
    sats, names = [], []
    for k, fields in enumerate(records, start=1):
        fields = {key: (val.strip() if isinstance(val, str) else val) for key, val in fields.items()
                  if key is not None}
        for key in _OMM_REQUIRED:
            if not fields.get(key):
                raise InputError(str(path), f"record {k}.{key}", fields.get(key), "missing")
        for key, val in _OMM_DEFAULTS.items():
            if not fields.get(key):
                fields[key] = val
        if "." not in fields["EPOCH"]:
            fields["EPOCH"] += ".0"  # sgp4's OMM reader wants fractional seconds
        sat = Satrec()
        try:
            omm.initialize(sat, fields, WGS72)
        except (ValueError, KeyError, TypeError, OverflowError) as exc:
            raise InputError(str(path), f"record {k}", fields.get("OBJECT_NAME"),
                             f"bad OMM field ({exc})") from None
        if sat.error:
            raise InputError(str(path), f"record {k}", fields.get("OBJECT_NAME"),
                             f"SGP4 rejects this element set (error {sat.error})")
        sats.append(sat)
        names.append(fields.get("OBJECT_NAME") or f"{params['name']}-{sat.satnum}")
    if not sats:
        raise InputError(str(path), None, None, "no OMM records found")
    _warn_spread(sats, params, str(path), ctx)
    return [from_satrec(nm, params["name"], s) for nm, s in zip(_unique(names), sats)]


TLE = Source(TLE_KEYS, _tle)
OMM = Source(OMM_KEYS, _omm)
