"""Benchmark cases: each runs in its own process (so peak memory is its own) and prints one
JSON object.  Every ratio is measured side by side with its reference in the same process.

Invented scenarios only: a 1,584-satellite Walker shell (72 planes, 550 km, 53 deg) named
"bench-shell", terminals at invented sites.
"""

from __future__ import annotations

import json
import resource
import sys
import time
from pathlib import Path

import numpy as np

START = "2027-05-10T00:00:00Z"


def shell(satellites=1584, planes=72, altitude_km=550.0, inclination_deg=53.0, name="bench-shell"):
    return {"kind": "walker-delta", "name": name, "satellites": satellites, "planes": planes,
            "phasing": 1, "altitude_km": altitude_km, "inclination_deg": inclination_deg}


def sites(n: int, seed: int = 1) -> list[dict]:
    """n invented sites spread over 60 S .. 60 N (one at 48 N, 11 E first)."""
    rng = np.random.default_rng(seed)
    out = [{"name": "site-0000", "lat_deg": 48.0, "lon_deg": 11.0, "min_elevation_deg": 25.0}]
    for i in range(1, n):
        out.append({"name": f"site-{i:04d}", "lat_deg": float(rng.uniform(-60, 60)),
                    "lon_deg": float(rng.uniform(-180, 180)), "min_elevation_deg": 25.0})
    return out


def scenario(duration_s: float, constellations: list[dict], terminals: list[dict],
             policies: list[dict] | None = None, link: dict | None = None,
             areas: list[dict] | None = None, **scen):
    from ..io.config import scenario_from_dict
    raw = {"scenario": {"start": START, "duration_s": duration_s, **scen},
           "constellation": constellations}
    if terminals:
        raw["terminal"] = terminals
    if areas:
        raw["area"] = areas
    if link:
        raw["link"] = link
    if policies:
        raw["policy"] = policies
    return scenario_from_dict(raw, "bench", Path("."))


def peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def our_windows(scen):
    from ..orbits.geometry import Geometry
    geo = Geometry(scen, slots=False)
    geo.run_all()
    frames = [geo.window_frame(k) for k in range(len(geo.sites))]
    geo.close()
    return frames


def skyfield_events(scen, site_params: list[dict], duration_s: float):
    """Reference: skyfield's per-satellite rise/set search, looped over satellites (and sites)."""
    from skyfield.api import EarthSatellite, load, wgs84
    ts = load.timescale(builtin=True)
    t0 = ts.from_datetime(scen.epoch.start)
    t1 = ts.tt_jd(t0.tt + duration_s / 86400.0)
    sats = [EarthSatellite.from_satrec(s.satrec, ts) for s in scen.constellation.satellites]
    out = []
    for p in site_params:
        topo = wgs84.latlon(p["lat_deg"], p["lon_deg"], p.get("alt_m", 0.0))
        per_site = []
        for i, sat in enumerate(sats):
            t, ev = sat.find_events(topo, t0, t1, altitude_degrees=p["min_elevation_deg"])
            per_site.append((i, (t.tt - t0.tt) * 86400.0, ev))
        out.append(per_site)
    return out


def dut1_s() -> float:
    from skyfield.api import load

    from ..orbits.timebase import parse_utc
    ts = load.timescale(builtin=True)
    return float(ts.from_datetime(parse_utc(START)).dut1)


def case_passes_one(duration_s: float, satellites: int) -> dict:
    """Target 1: pass table for one terminal against skyfield's find_events."""
    terms = sites(1)
    planes = 72 if satellites % 72 == 0 else 1
    scen = scenario(duration_s, [shell(satellites, planes)], terms, ut1_utc_s=dut1_s())
    ours_s, frames = _timed(lambda: our_windows(scen))
    ref_s, events = _timed(lambda: skyfield_events(scen, terms, duration_s))
    w = frames[0]
    errs, unmatched = [], 0
    for i, t, ev in events[0]:
        mine = w[w["sat"] == i]
        for code, col in ((0, "start_s"), (2, "end_s")):
            ref = t[ev == code]
            ref = ref[(ref > 1.0) & (ref < duration_s - 1.0)]
            have = mine[col].to_numpy()
            for x in ref:
                d = np.abs(have - x)
                if d.size and d.min() < 2.0:
                    errs.append(float(d.min()))
                else:
                    unmatched += 1
    return {"case": "passes-1-terminal", "ours_s": ours_s, "reference_s": ref_s,
            "ratio": ref_s / ours_s, "target_ratio": 8.0, "max_event_diff_s": max(errs or [0.0]),
            "events_compared": len(errs), "unmatched_events": unmatched, "peak_mib": peak_mib()}


def case_passes_many(duration_s: float, satellites: int, n_terminals: int, ref_terminals: int) -> dict:
    """Target 2: many terminals with shared propagation against the reference looped over
    terminals (timed on ``ref_terminals`` and scaled)."""
    terms = sites(n_terminals)
    scen = scenario(duration_s, [shell(satellites)], terms)
    ours_s, _ = _timed(lambda: our_windows(scen))
    sub = terms[:ref_terminals]
    ref_s, _ = _timed(lambda: skyfield_events(scen, sub, duration_s))
    scaled = ref_s * n_terminals / ref_terminals
    return {"case": f"passes-{n_terminals}-terminals", "ours_s": ours_s, "reference_s": scaled,
            "reference_measured_s": ref_s, "ratio": scaled / ours_s, "target_ratio": 50.0,
            "peak_mib": peak_mib()}


KERNEL_REPEATS = 3     # each kernel runs this often on the same rows; the least time counts

A3_POLICY = {"name": "a3", "rule": "a3", "offset_db": 3.0, "hysteresis_db": 1.0,
             "time_to_trigger_s": 0.64}


def case_kernel(duration_s: float, satellites: int, shadowing_std_db: float = 2.0,
                measurement_noise_db: float = 1.0, hysteresis_db: float = 1.0) -> dict:
    """Target 3: the event kernel against the naive per-measurement kernel, same rows.

    The ratio depends on how long links last (the naive kernel's cost is per measurement, the
    event kernel's per handover), so the case is run with noisy and with calm measurements."""
    import simpy

    from .. import policies as pm
    from ..kernel.common import Execution, RunSettings
    from ..kernel.fast import FastRun
    from ..kernel.naive import NaiveRun
    from ..orbits.geometry import Geometry
    from ..radio.measure import MeasurementStream

    scen = scenario(duration_s, [shell(satellites)], sites(1),
                    [{**A3_POLICY, "hysteresis_db": hysteresis_db}])
    scen.link.update({"shadowing_std_db": shadowing_std_db,
                      "measurement_noise_db": measurement_noise_db})
    geo = Geometry(scen)
    stream = MeasurementStream(geo, 0, scen.link, 1.0, scen.seed)
    hold = object()
    stream.release(0, hold)                  # keep every row: both kernels read the same ones
    build_s, _ = _timed(lambda: stream.rows(0, stream.K))
    out = {}
    for name, cls in (("fast", FastRun), ("naive", NaiveRun)):
        times = []
        for _ in range(KERNEL_REPEATS):
            env = simpy.Environment()
            policy = pm.build(scen.policies[0], 1.0)
            ex = Execution(RunSettings.of(scen.terminals[0], policy, stream.lp, geo.duration_s,
                                          1.0), stream)
            cls(env, policy, ex)
            stream.release(0, hold)
            t, _ = _timed(env.run)
            times.append(t)
        # the least of the repeats for both kernels: on a shared machine the other figures
        # measure the neighbours (the minimum is what the timeit documentation advises)
        out[name] = (min(times), ex.rec)
    same = out["fast"][1].signature() == out["naive"][1].signature()
    label = f"kernel-a3-hys{hysteresis_db:g}-noise{measurement_noise_db:g}-shadow{shadowing_std_db:g}"
    n_ho = len(out["fast"][1].handovers)
    return {"case": label, "ours_s": out["fast"][0], "mean_dwell_s": duration_s / max(1, n_ho),
            "reference_s": out["naive"][0], "ratio": out["naive"][0] / out["fast"][0],
            "target_ratio": 20.0, "same_handovers": same, "repeats": KERNEL_REPEATS,
            "handovers": len(out["fast"][1].handovers), "rows_build_s": build_s,
            "peak_mib": peak_mib()}


VARIANTS = {
    # issue 12 target: the handover procedure adds at most 30 % to the A3 case
    "procedure": ({"procedure": "instant"}, {"procedure": "nr"}, {}, {}, 1.3),
    # issue 11 targets: 19 earth-moving beams at most 2x one beam; interference at most 3x
    "beams-19": ({}, {}, {}, {"beams": {"layout": "hex", "rings": 2, "reuse": 3}}, 2.0),
    "interference": ({}, {}, {"interference": False},
                     {"beams": {"layout": "hex", "rings": 2, "reuse": 1}}, 3.0),
}


def case_variant(variant: str, duration_s: float, satellites: int) -> dict:
    """A feature's cost: one terminal's whole run (geometry, measurements, kernel) with the
    feature against the same run without it.  ``ratio`` is baseline time / feature time, so it
    meets ``target_ratio`` = 1 / (allowed cost factor) from above like the other cases."""
    from ..kernel import run_scenario

    pol_base, pol_var, link_base, beams, allowed = VARIANTS[variant]
    noisy = {"shadowing_std_db": 2.0, "measurement_noise_db": 1.0}
    spot = {"preset": "s-band-leo600-handheld"}    # spot beams (TR 38.821) for the hex layouts
    times = {}
    counts = {}
    for which in ("base", "variant"):
        con = shell(satellites)
        link = dict(noisy)
        pol = dict(A3_POLICY)
        if which == "base":            # the single wide beam of the one-beam world, or
            pol.update(pol_base)       # the same hex layout without the feature
            link.update(link_base)
            if variant == "interference":
                con.update(beams)
                link.update(spot)
        else:
            pol.update(pol_var)
            con.update(beams)
            if beams:
                link.update(spot)
        scen = scenario(duration_s, [con], sites(1), [pol], link=link)
        t, (res, _) = _timed(lambda: run_scenario(scen, kernel="fast"))
        times[which] = t
        counts[which] = len(res[0].records.handovers)
    return {"case": f"cost-{variant}", "ours_s": times["variant"], "reference_s": times["base"],
            "ratio": times["base"] / times["variant"], "target_ratio": 1.0 / allowed,
            "handovers": counts["variant"], "peak_mib": peak_mib()}


def case_demo(config: str) -> dict:
    """Target 4: the whole demo run against one SGP4 pass of its shell on a 60 s grid."""
    import tempfile

    from sgp4.api import SatrecArray

    from ..io.config import load_scenario
    from ..run import execute
    scen = load_scenario(config)
    arr = SatrecArray([s.satrec for s in scen.constellation.satellites])
    t = np.arange(0.0, float(scen.scenario["duration_s"]) + 60.0, 60.0)
    jd, fr = scen.epoch.julian(t)
    sgp4_s, _ = _timed(lambda: arr.sgp4(jd, fr))
    with tempfile.TemporaryDirectory() as tmp:
        run_s, _ = _timed(lambda: execute(scen, Path(tmp) / "run", workers=2))
    return {"case": "demo-run", "ours_s": run_s, "reference_s": sgp4_s,
            "ratio": run_s / sgp4_s, "target_ratio": 6.0, "ratio_is": "ours / SGP4 60 s grid (<= target)",
            "workers": 2,
            "peak_mib": peak_mib()}


def case_stress_terminals(n_terminals: int, duration_s: float) -> dict:
    """Hardening stress: many terminals for a day under one A3 policy (memory stays bounded
    because each terminal's rows are dropped once read)."""
    from ..kernel import run_scenario
    scen = scenario(duration_s, [shell()], sites(n_terminals), [A3_POLICY])
    t, (res, geo) = _timed(lambda: run_scenario(scen))
    return {"case": f"stress-{n_terminals}-terminals", "ours_s": t,
            "handovers": sum(len(r.records.handovers) for r in res), "peak_mib": peak_mib(),
            "target_peak_mib": 2048.0}


AREA_BUDGET_S = 1800.0        # issue 15: 10,000 terminals over one day in 30 min on 2 cores
AREA_BUDGET_MIB = 4096.0      # ... and under 4 GiB peak
AREA_TERMINAL_DAYS = 10_000


def case_area(n_terminals: int, duration_s: float, workers: int = 2) -> dict:
    """An area study: ``n_terminals`` random points of an invented region (0-60 N, 10 W-30 E)
    under noisy A3 on the bench shell, the whole ``dwell run`` (pass finding, measurements,
    kernels, tables, load and map tables, files) on ``workers`` processes.  The budget is the
    issue's 30 minutes for 10,000 terminal-days, scaled to this case's terminal-days (so a
    smaller case meets its share of it); memory is the larger of the parent's and the
    largest worker's peak resident size."""
    import tempfile

    from ..run import execute
    area = {"name": "bench-plain", "lat_min_deg": 0.0, "lat_max_deg": 60.0,
            "lon_min_deg": -10.0, "lon_max_deg": 30.0, "count": int(n_terminals),
            "min_elevation_deg": 25.0}
    noisy = {"shadowing_std_db": 2.0, "measurement_noise_db": 1.0}
    scen = scenario(duration_s, [shell()], [], [A3_POLICY], link=noisy, areas=[area])
    with tempfile.TemporaryDirectory() as tmp:
        t, tables = _timed(lambda: execute(scen, Path(tmp) / "run", workers=workers))
        handovers = len(tables.frames["handovers"])
    days = n_terminals * duration_s / 86400.0
    budget_s = AREA_BUDGET_S * days / AREA_TERMINAL_DAYS
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0
    return {"case": f"area-{n_terminals}-terminals", "ours_s": t, "reference_s": budget_s,
            "ratio": t / budget_s, "target_ratio": 1.0,
            "ratio_is": "time / its share of 30 min per 10,000 terminal-days (<= target)",
            "per_terminal_day_s": t * workers / days, "handovers": handovers,
            "workers": workers, "peak_mib": max(peak_mib(), children),
            "parent_peak_mib": peak_mib(), "worker_peak_mib": children,
            "target_peak_mib": AREA_BUDGET_MIB}


def case_memory(kind: str, duration_s: float) -> dict:
    """Target 5: peak memory of long or large runs (chunked: must not grow with duration)."""
    from ..kernel import run_scenario
    if kind == "week-1-terminal":
        scen = scenario(duration_s, [shell()], sites(1), [A3_POLICY])
    else:  # a 10,000-satellite multi-shell constellation
        shells = [shell(4032, 72, 540.0, 53.0, "bench-a"), shell(3600, 72, 570.0, 70.0, "bench-b"),
                  shell(2368, 32, 1100.0, 86.0, "bench-c")]
        scen = scenario(duration_s, shells, sites(1), [A3_POLICY])
    t, (res, geo) = _timed(lambda: run_scenario(scen))
    return {"case": f"memory-{kind}", "ours_s": t, "satellites": len(scen.constellation),
            "duration_s": duration_s, "handovers": len(res[0].records.handovers),
            "peak_mib": peak_mib(), "target_peak_mib": 2048.0}


def case_scale(axis: str, value: float, base: dict) -> dict:
    """One point of the scaling table (pass finding and one A3 kernel run)."""
    from ..kernel import run_scenario
    sats = int(value) if axis == "satellites" else base["satellites"]
    terms = int(value) if axis == "terminals" else base["terminals"]
    dur = float(value) if axis == "duration_s" else base["duration_s"]
    planes = 72 if sats % 72 == 0 else (50 if sats % 50 == 0 else 1)
    scen = scenario(dur, [shell(sats, planes)], sites(terms))
    t_geo, _ = _timed(lambda: our_windows(scen))
    scen1 = scenario(dur, [shell(sats, planes)], sites(1), [A3_POLICY])
    t_run, _ = _timed(lambda: run_scenario(scen1))
    return {"case": f"scale-{axis}", "axis": axis, "value": value, "passes_s": t_geo,
            "run_1_terminal_s": t_run, "peak_mib": peak_mib()}


CASES = {"variant": case_variant, "passes-one": case_passes_one, "passes-many": case_passes_many, "kernel": case_kernel,
         "demo": case_demo, "memory": case_memory, "scale": case_scale,
         "stress-terminals": case_stress_terminals, "area": case_area}

if __name__ == "__main__":
    name = sys.argv[1]
    kwargs = json.loads(sys.argv[2])
    result = CASES[name](**kwargs)
    print("BENCH-RESULT " + json.dumps(result, default=float))
