"""Tables the geometry layer produces: passes (visibility windows) and satellites in view."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..orbits.geometry import Geometry, cause_name, coverage_steps
from ..orbits.passes import CAUSE_EDGE


# columns of the pass table and their dtypes (an empty table keeps them)
PASS_COLUMNS = {"terminal": object, "satellite": object, "shell": object, "rise_utc": "float64",
                "culmination_utc": "float64", "set_utc": "float64", "duration_s": "float64",
                "max_elevation_deg": "float64", "cut_at_start": bool, "cut_at_end": bool,
                "start_cause": object, "end_cause": object, "pass_index": "int64",
                "rise_s": "float64", "set_s": "float64"}


def passes_frame(geo: Geometry) -> pd.DataFrame:
    """One row per visibility window of every terminal (a pass cut by obstructions gives several
    rows sharing ``pass_index``).  Times are scenario seconds in ``*_utc`` columns (converted to
    UTC timestamps when written)."""
    names = geo.scen.constellation.names
    shells = [s.shell for s in geo.scen.constellation.satellites]
    parts = []
    for k, site in enumerate(geo.sites):
        w = geo.window_frame(k)
        if w.empty:
            continue
        sat = w["sat"].to_numpy()
        parts.append(pd.DataFrame({
            "terminal": site.name,
            "satellite": np.asarray(names, dtype=object)[sat],
            "shell": np.asarray(shells, dtype=object)[sat],
            "rise_utc": w["start_s"].to_numpy(),
            "culmination_utc": w["culm_s"].to_numpy(),
            "set_utc": w["end_s"].to_numpy(),
            "duration_s": (w["end_s"] - w["start_s"]).to_numpy(),
            "max_elevation_deg": w["culm_el_deg"].to_numpy(),
            "cut_at_start": (w["start_cause"] == CAUSE_EDGE).to_numpy(),
            "cut_at_end": (w["end_cause"] == CAUSE_EDGE).to_numpy(),
            "start_cause": cause_name(w["start_cause"]),
            "end_cause": cause_name(w["end_cause"]),
            "pass_index": w["pass_id"].to_numpy(),
            "rise_s": w["start_s"].to_numpy(),
            "set_s": w["end_s"].to_numpy(),
        }))
    if not parts:   # typed, so that frames of workers that saw nothing concatenate cleanly
        return pd.DataFrame({name: pd.Series(dtype=dtype) for name, dtype in PASS_COLUMNS.items()})
    df = pd.concat(parts, ignore_index=True)
    df = df.replace({"start_cause": {"edge": "scenario-edge"}, "end_cause": {"edge": "scenario-edge"}})
    return df


def visible_frame(geo: Geometry) -> pd.DataFrame:
    """Run-length encoded count of satellites in view per terminal: one row per interval of
    constant count (start, end, count)."""
    parts = []
    for k, site in enumerate(geo.sites):
        w = geo.window_frame(k)
        a, b, n = coverage_steps(w["start_s"].to_numpy(), w["end_s"].to_numpy(), geo.duration_s)
        parts.append(pd.DataFrame({"terminal": site.name, "start_utc": a, "end_utc": b,
                                   "duration_s": b - a, "in_view": n.astype(np.int32)}))
    return pd.concat(parts, ignore_index=True)


def pass_summary(passes: pd.DataFrame, visible: pd.DataFrame, duration_s: float,
                 terminals: list[str]) -> pd.DataFrame:
    """Per terminal: windows per hour, mean and max duration, mean number in view, share of
    time with none in view."""
    rows = []
    hours = duration_s / 3600.0
    for name in terminals:
        p = passes[passes["terminal"] == name]
        v = visible[visible["terminal"] == name]
        rows.append({
            "terminal": name,
            "windows": int(len(p)),
            "windows_per_hour": len(p) / hours,
            "mean_duration_s": float(p["duration_s"].mean()) if len(p) else float("nan"),
            "max_duration_s": float(p["duration_s"].max()) if len(p) else float("nan"),
            "mean_in_view": float((v["in_view"] * v["duration_s"]).sum() / duration_s),
            "none_in_view_fraction": float(v.loc[v["in_view"] == 0, "duration_s"].sum() / duration_s),
        })
    return pd.DataFrame(rows)
