"""SINR coverage of nearest-satellite association on an isotropic shell
(dwell.analysis.sinr_coverage, docs/sinr-coverage.md) against Monte Carlo of the binomial point
process itself, and the power-versus-angle function against hand geometry."""

from __future__ import annotations

import math

import numpy as np
import pytest

from dwell.analysis import sinr_coverage as C
from dwell.analysis.analytic import cap_half_angle_rad
from dwell.radio.link import LinkModel

R_KM = 6371.0  # the sphere of TR 38.821's tables
THRESHOLDS_DB = np.array([-5.0, 0.0, 5.0, 10.0])


def _mc_sinr(n_sat, psi_c, snr, load, fading, snapshots, seed):
    """Snapshots of N independent uniform satellites (uniform cos(psi) about the terminal),
    the nearest serves, the others in view interfere with `load` of their power; Rayleigh:
    independent unit-mean exponential power gains.  s(psi) tabulated on a 2e5-point grid
    (linear interpolation; its error is far below the Monte Carlo error).  Returns the SINR of
    the snapshots with a satellite in view."""
    rng = np.random.default_rng(seed)
    grid = np.linspace(0.0, psi_c, 200001)
    table = snr(grid)
    out = []
    for _ in range(snapshots // 20000):
        psi = np.arccos(rng.uniform(-1.0, 1.0, (20000, n_sat)))
        inview = psi <= psi_c
        power = np.where(inview, np.interp(psi, grid, table), 0.0)
        if fading == "rayleigh":
            power = power * rng.exponential(1.0, power.shape)
        near = np.argmin(psi, axis=1)
        rows = np.arange(psi.shape[0])
        ok = inview[rows, near]
        signal = power[rows, near]
        interference = load * (power.sum(axis=1) - signal)
        out.append((signal / (1.0 + interference))[ok])
    return np.concatenate(out)


CASES = [
    # (altitude km, floor deg, satellites, load, link table) -- none of them the demo's
    (600.0, 20.0, 200, 1.0, {}),
    # 12 GHz, 5 cm aperture: one null inside the cap
    (1200.0, 30.0, 120, 0.5, {"frequency_ghz": 12.0, "sat_aperture_m": 0.05,
                              "eirp_density_dbw_mhz": 35.0}),
    # a 2 m aperture: the satellite pattern has nulls inside the cap, so s(psi) is far from
    # monotone (TR 38.811 pattern, first null ~10 deg off boresight at 2 GHz)
    (800.0, 25.0, 300, 1.0, {"sat_aperture_m": 2.0, "sat_max_gain_dbi": 30.0,
                             "eirp_density_dbw_mhz": 34.0}),
]


@pytest.mark.parametrize("alt, floor, n_sat, load, link", CASES)
@pytest.mark.parametrize("fading", ["none", "rayleigh"])
def test_sinr_coverage_against_binomial_point_process(alt, floor, n_sat, load, link, fading):
    # Laplace transform / characteristic function of the interference given the nearest
    # satellite's angle (Haenggi 2012 ch. 5; Chiu, Stoyan, Kendall and Mecke 2013 for the
    # binomial process), integrated over the nearest satellite's law.  Monte Carlo of the same
    # model; tolerance 5 binomial standard errors per threshold (independent snapshots) plus
    # 2e-4 absolute for the lattice inversion (bins of ~1e-4 of the interference's range)
    # and the 64-node quadratures.
    r = R_KM + alt
    psi_c = float(cap_half_angle_rad(floor, r, R_KM))
    snr = C.snr_of_central_angle(link, R_KM, r)
    want = C.isotropic_sinr_ccdf(THRESHOLDS_DB, n_sat, psi_c, snr, load, fading)
    sinr = _mc_sinr(n_sat, psi_c, snr, load, fading, 200000, seed=n_sat + int(alt))
    got = np.array([np.mean(sinr > 10 ** (t / 10)) for t in THRESHOLDS_DB])
    se = np.sqrt(np.maximum(got * (1 - got), 1e-12) / sinr.size)
    np.testing.assert_array_less(np.abs(got - want), 5 * se + 2e-4)
    # the check must bite: coverage varies across the thresholds at these settings
    assert want.max() - want.min() > 0.1


def test_one_satellite_in_view_is_plain_snr():
    # With N = 1 there is no interference: P(SNR > T | in view) is the cap-area fraction where
    # s(psi) > T (uniform cos psi over the cap), and with Rayleigh fading the cap average of
    # exp(-T / s(psi)) (exponential tail), by direct evaluation on a fine grid
    # (tolerance: 1e-4 from the grid and quadrature).
    r = R_KM + 700.0
    psi_c = float(cap_half_angle_rad(15.0, r, R_KM))
    snr = C.snr_of_central_angle({}, R_KM, r)
    u = np.linspace(math.cos(psi_c), 1.0, 400001)
    s_u = snr(np.arccos(u))
    got = C.isotropic_sinr_ccdf(THRESHOLDS_DB, 1, psi_c, snr, 1.0, "none")
    np.testing.assert_allclose(got, [np.mean(s_u > 10 ** (t / 10)) for t in THRESHOLDS_DB],
                               atol=1e-4)
    got = C.isotropic_sinr_ccdf(THRESHOLDS_DB, 1, psi_c, snr, 1.0, "rayleigh")
    np.testing.assert_allclose(got, [np.mean(np.exp(-10 ** (t / 10) / s_u))
                                     for t in THRESHOLDS_DB], atol=1e-4)


@pytest.mark.parametrize("alt, psi", [(600.0, 0.0), (600.0, 0.15), (1500.0, 0.3)])
def test_power_of_central_angle_matches_hand_geometry(alt, psi):
    # Plane triangle Earth centre - terminal - satellite (law of cosines and sine rule, common
    # practice): range d = sqrt(R^2 + r^2 - 2 R r cos psi), elevation = arcsin((r cos psi - R)/d),
    # off-boresight angle at the satellite = arcsin(R sin psi / d); the budget is then
    # LinkModel's.  tolerance: float rounding (1e-9 dB).
    r = R_KM + alt
    d = math.sqrt(R_KM ** 2 + r ** 2 - 2 * R_KM * r * math.cos(psi))
    elev = math.degrees(math.asin((r * math.cos(psi) - R_KM) / d))
    theta = math.degrees(math.asin(R_KM * math.sin(psi) / d))
    want_db = float(LinkModel({}).budget(d, elev, theta)["snr_db"])
    got = float(C.snr_of_central_angle({}, R_KM, r)(np.array([psi]))[0])
    assert 10 * math.log10(got) == pytest.approx(want_db, abs=1e-9)
