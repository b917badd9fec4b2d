"""The until-lost handover rate (dwell.analysis.until_lost, docs/inclined-shells.md) against
Monte Carlo of ideal circular orbits propagated here (not SGP4, not dwell's simulator)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from dwell.analysis.analytic import cap_half_angle_rad
from dwell.analysis.shells import Shell, Site
from dwell.analysis import until_lost as U

ORBIT_R = 1.1  # orbit radius in Earth radii (LEO-like); only psi0 and the rates matter


def _site(psi0: float, lat_deg: float, earth_rate: float) -> Site:
    """A site on the unit sphere whose cap for ORBIT_R has half-angle psi0."""
    floor = brentq(lambda e: float(cap_half_angle_rad(e, ORBIT_R, 1.0)) - psi0, -4.9, 89.9,
                   xtol=1e-13)
    return Site(lat_deg, 1.0, floor, earth_rate)


def _orbits(rng, m, inclination_deg):
    """(n1, n2) per satellite: position cos(u) n1 + sin(u) n2 (inertial, node uniform);
    None = uniformly random normals."""
    if inclination_deg is None:
        inc = np.arccos(rng.uniform(-1.0, 1.0, m))
    else:
        inc = np.full(m, math.radians(inclination_deg))
    node = rng.uniform(0.0, 2 * np.pi, m)
    n1 = np.stack([np.cos(node), np.sin(node), np.zeros(m)], axis=-1)
    n2 = np.stack([-np.sin(node) * np.cos(inc), np.cos(node) * np.cos(inc), np.sin(inc)], axis=-1)
    return n1, n2


def _terminal(lat_deg, earth_rate, t):
    lat = math.radians(lat_deg)
    t = np.asarray(t, dtype=float)
    return np.stack([np.cos(lat) * np.cos(earth_rate * t), np.cos(lat) * np.sin(earth_rate * t),
                     np.full(t.shape, math.sin(lat))], axis=-1)


@pytest.mark.parametrize("incl, lat, psi0, ratio, n_sat", [
    (None, 35.0, 0.4, 0.3, 120),     # isotropic, strong rotation
    (53.0, 30.0, 0.35, 0.1, 200),    # inclined, mid latitude
    (70.0, 65.0, 0.3, 0.066, 300),   # inclined, cap near the orbits' highest latitude
])
def test_nearest_remaining_visibility_against_snapshots(incl, lat, psi0, ratio, n_sat):
    # The exact part of the formula: mean remaining visibility of the nearest in-view
    # satellite at a typical instant (binomial law of independent satellites).  Monte Carlo:
    # snapshots of N independent satellites (uniform node and phase), the nearest in the cap
    # propagated on its ideal circular orbit (omega = 1) against the turning terminal until it
    # leaves, on a 2e-4 rad time grid (the exit instant's error < 2e-4, far below the error
    # allowed below).
    rng = np.random.default_rng(int(psi0 * 100) + n_sat)
    snaps = 4000
    n1, n2 = _orbits(rng, snaps * n_sat, incl)
    u0 = rng.uniform(0.0, 2 * np.pi, snaps * n_sat)
    pos = (np.cos(u0)[:, None] * n1 + np.sin(u0)[:, None] * n2).reshape(snaps, n_sat, 3)
    vel = (-np.sin(u0)[:, None] * n1 + np.cos(u0)[:, None] * n2).reshape(snaps, n_sat, 3)
    term0 = _terminal(lat, ratio, 0.0)
    cosang = pos @ term0
    near = np.argmax(cosang, axis=1)
    seen = cosang[np.arange(snaps), near] >= math.cos(psi0)
    x = pos[np.arange(snaps), near][seen]
    e = vel[np.arange(snaps), near][seen]
    dt = 2e-4
    t = np.arange(0.0, 3.0 * psi0 / (1 - ratio), dt)
    term = _terminal(lat, ratio, t)
    c = np.cos(t)[None, :] * (x @ term.T) + np.sin(t)[None, :] * (e @ term.T)
    resid = np.argmax(c < math.cos(psi0), axis=1) * dt
    site = _site(psi0, lat, ratio)
    want = U.until_lost_mean_dwell_s(Shell(n_sat, ORBIT_R, 1.0, incl), site, independent=True)
    # Monte Carlo error: independent snapshots; 5 standard errors
    assert abs(resid.mean() - want) < 5 * resid.std(ddof=1) / math.sqrt(resid.size)


def _until_lost_mc(incl, lat, psi0, ratio, n_sat, shells, orbits, seed, steps_per_orbit=2048):
    """The until-lost rule itself on `shells` independent realizations: serve until the
    satellite leaves the cap, then take the nearest in view; returns handovers per unit time
    per realization (omega = 1)."""
    rng = np.random.default_rng(seed)
    n1, n2 = _orbits(rng, shells * n_sat, incl)
    n1, n2 = n1.reshape(shells, n_sat, 3), n2.reshape(shells, n_sat, 3)
    u0 = rng.uniform(0.0, 2 * np.pi, (shells, n_sat))
    h = 2 * np.pi / steps_per_orbit
    c0 = math.cos(psi0)
    serving = np.full(shells, -1)
    count = np.zeros(shells)
    rows = np.arange(shells)
    for k in range(orbits * steps_per_orbit):
        t = k * h
        term = _terminal(lat, ratio, t)
        z = np.cos(u0 + t) * (n1 @ term) + np.sin(u0 + t) * (n2 @ term)
        lost = (serving < 0) | (z[rows, np.maximum(serving, 0)] < c0)
        near = np.argmax(z, axis=1)
        has = z[rows, near] >= c0
        count += lost & has & (serving >= 0)
        serving = np.where(lost, np.where(has, near, -1), serving)
    return count / (orbits * 2 * np.pi)


@pytest.mark.slow
@pytest.mark.parametrize("incl, lat, psi0, ratio, n_sat", [
    (None, 20.0, 0.35, 0.066, 650),   # isotropic, ~20 in view
    (53.0, 40.0, 0.3, 0.066, 520),    # inclined, ~20 in view
])
def test_until_lost_rate_against_the_rule_simulated(incl, lat, psi0, ratio, n_sat):
    # The renewal approximation against the rule itself, simulated on independent circular
    # orbits with a turning terminal.  Tolerance: 5 standard errors over independent
    # realizations, plus 2 % for the renewal approximation (docs/inclined-shells.md: at ~20
    # satellites in view its dwell came out 0.3-1.1 % short in Monte Carlo, 1-3 % at 7-10).
    # Sampling step 2 pi / 2048: a loss is seen up to one step late, which shifts handover
    # instants but not their number.
    site = _site(psi0, lat, ratio)
    shell = Shell(n_sat, ORBIT_R, 1.0, incl)
    rate = _until_lost_mc(incl, lat, psi0, ratio, n_sat, 60, 3, seed=n_sat)
    want = U.until_lost_handover_rate_per_s(shell, site, independent=True)
    se = rate.std(ddof=1) / math.sqrt(rate.size)
    assert abs(rate.mean() - want) < 5 * se + 0.02 * want


def test_until_lost_dense_limit_is_the_zenith_exit_time():
    # As the shell gets dense the nearest satellite sits at the zenith, and on a frozen Earth
    # any great circle through the zenith leaves the cap after psi0 / omega (geometry):
    # the mean dwell tends to psi0 / omega.  At 2,000 satellites in view the nearest is
    # ~0.01 psi0 off the zenith, shortening the remaining arc by ~(0.01)^2/4 relative.
    psi0 = 0.3
    site = _site(psi0, 10.0, 0.0)
    n = int(2000 / ((1 - math.cos(psi0)) / 2))
    assert U.until_lost_mean_dwell_s(Shell(n, ORBIT_R, 1.0, None), site) == pytest.approx(
        psi0, rel=1e-3)
