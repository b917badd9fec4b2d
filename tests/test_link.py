"""Checks of dwell.link against standards, handbook formulas and plain geometry."""

from __future__ import annotations

import math
import warnings

import numpy as np
import pytest
from scipy import constants
from scipy.optimize import brentq
from scipy.special import j1

from dwell.io.errors import InputError
from dwell.radio import link
from dwell.radio.noise import normal, stream_id

C_M_S = constants.c  # scipy.constants (CODATA): the reference value of c


# ---- free-space loss ----------------------------------------------------------------------------

@pytest.mark.parametrize("f_ghz, d_km", [(2.0, 1000.0), (20.0, 1200.0), (20.0, 35786.0)])
def test_fspl_matches_itu_r_p525(f_ghz, d_km):
    got = float(link.fspl_db(d_km, f_ghz))
    # ITU-R P.525 eq. (4) worked by hand: L_bf = 32.4 + 20 log10 f_MHz + 20 log10 d_km.
    # Tolerance 0.05 dB: the rounding of the constant (exact 20 log10(4 pi 1e9 / c) = 32.448).
    p525 = 32.4 + 20 * math.log10(f_ghz * 1e3) + 20 * math.log10(d_km)
    assert abs(got - p525) < 0.05
    # ITU-R P.525 eq. (1), the definition: L_bf = 20 log10(4 pi d / lambda), lambda from
    # scipy.constants.c.  Tolerance: floating point only.
    lam_m = C_M_S / (f_ghz * 1e9)
    assert got == pytest.approx(20 * math.log10(4 * math.pi * d_km * 1e3 / lam_m), abs=1e-9)


def test_fspl_2ghz_1000km_value():
    # Hand arithmetic of P.525's form: 32.45 + 66.02 + 60.00 = 158.47 dB (textbook 32.45
    # constant, common practice); tolerance 0.01 dB = rounding of the hand terms.
    assert float(link.fspl_db(1000.0, 2.0)) == pytest.approx(158.47, abs=0.01)


# ---- satellite pattern --------------------------------------------------------------------------

def _lambda_m(f_ghz):
    return C_M_S / (f_ghz * 1e9)


def test_half_power_argument_of_uniform_aperture():
    # Balanis, Antenna Theory (circular aperture, uniform illumination): 2 J1(x)/x = 1/sqrt(2)
    # at x = 1.6163; checked with scipy.special.j1 (reference library).  Tolerance: the 4
    # decimals quoted.
    x = brentq(lambda x: 2 * j1(x) / x - 1 / math.sqrt(2), 0.5, 3.0)
    assert x == pytest.approx(1.6163, abs=5e-5)


@pytest.mark.parametrize("f_ghz, d_m, g_max", [(2.0, 2.0, 30.0), (20.0, 10.0, 60.0)])
def test_tr38811_pattern_half_power_beamwidth(f_ghz, d_m, g_max):
    lam = _lambda_m(f_ghz)
    ka = math.pi * d_m / lam  # k a = 2 pi / lambda * D / 2
    null_deg = math.degrees(math.asin(3.8317 / ka))
    half = 10 * math.log10(0.5)  # half power, -3.0103 dB
    theta3 = brentq(lambda t: float(link.satellite_gain_dbi(t, d_m, f_ghz, g_max)) - g_max - half,
                    1e-6, 0.99 * null_deg, xtol=1e-12)
    # Balanis, circular aperture: the half-power point is at k a sin(theta) = 1.6163.
    # Tolerance 1e-4 relative: the 5-digit constant 1.6163.
    assert theta3 == pytest.approx(math.degrees(math.asin(1.6163 / ka)), rel=1e-4)
    # Full HPBW ~ 2 * 1.6163 / pi * lambda/D rad = 58.96 lambda/D deg (small-angle form of the
    # same handbook result).  Tolerance 0.3 %: small-angle error (x^2/6 with x = 0.039 rad is
    # 2.5e-4) plus rounding of 58.96.  (The common ~70 lambda/D rule of thumb is for tapered
    # illumination, which widens the beam; the uniform aperture of TR 38.811 is narrower.)
    assert 2 * theta3 == pytest.approx(58.96 * lam / d_m, rel=3e-3)


@pytest.mark.parametrize("f_ghz, d_m", [(2.0, 2.0), (20.0, 10.0)])
def test_tr38811_pattern_first_null(f_ghz, d_m):
    lam = _lambda_m(f_ghz)
    ka = math.pi * d_m / lam
    # First zero of J1 at 3.8317 (Abramowitz and Stegun Table 9.5); the pattern has its first
    # null there: far below the peak and a local minimum.
    null = math.degrees(math.asin(3.8317 / ka))
    g = link.satellite_gain_dbi(np.array([0.995, 1.0, 1.005]) * null, d_m, f_ghz, 30.0)
    assert g[1] < 30.0 - 60.0  # at least 60 dB down: 3.8317 is rounded to 4 decimals
    assert g[1] < g[0] and g[1] < g[2]
    # Balanis: first null at 1.22 lambda/D rad (small angle).  Tolerance 0.5 %: the 3-digit
    # constant (3.8317/pi = 1.2197) plus the small-angle error x^2/6 at x = 0.092 rad (1.4e-3).
    assert math.radians(null) == pytest.approx(1.22 * lam / d_m, rel=5e-3)


def test_tr38811_pattern_boresight_is_finite_and_peak():
    # TR 38.811 6.4.1: G = G_max at theta = 0; the limit 2 J1(x)/x -> 1 (series of J1,
    # Abramowitz and Stegun 9.1.10).  No 0/0 warning allowed.  Tolerance: floating point.
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        g = link.satellite_gain_dbi(np.array([0.0, 1e-12, -1e-9, 1e-4]), 2.0, 2.0, 30.0)
    assert g[0] == 30.0
    assert np.all(np.isfinite(g))
    assert np.allclose(g, 30.0, atol=1e-6)
    # outside TR 38.811's 0..90 deg domain the gain is held at its 90 deg value (our choice),
    # not folded back to the peak by sin(theta)
    g90 = float(link.satellite_gain_dbi(90.0, 2.0, 2.0, 30.0))
    assert float(link.satellite_gain_dbi(150.0, 2.0, 2.0, 30.0)) == g90 < 0.0
    # symmetric in theta (the pattern uses |theta|)
    assert float(link.satellite_gain_dbi(-3.0, 2.0, 2.0, 30.0)) == \
        pytest.approx(float(link.satellite_gain_dbi(3.0, 2.0, 2.0, 30.0)), abs=1e-12)


# ---- Doppler, delay, geometry -------------------------------------------------------------------

def test_doppler_hand_value():
    # f v / c = 2e9 * 7 / 299792.458 = 46.70 kHz (hand formula); positive when approaching
    # (range rate < 0, common practice).  Tolerance 50 Hz: the 3-digit 46.7 kHz.
    assert float(link.doppler_hz(-7.0, 2.0)) == pytest.approx(46.7e3, abs=50)
    assert float(link.doppler_hz(7.0, 2.0)) == pytest.approx(-46.7e3, abs=50)


def test_one_way_delay_hand_value():
    # 1932 km / c = 6.444 ms (hand formula); tolerance 0.005 ms: the 3-digit 6.44 ms.
    assert float(link.one_way_delay_ms(1932.0)) == pytest.approx(6.44, abs=5e-3)
    # and exactly d / c with scipy.constants.c
    assert float(link.one_way_delay_ms(1932.0)) == pytest.approx(1932e3 / C_M_S * 1e3, rel=1e-12)


def test_off_boresight_directly_below_is_zero():
    # plain geometry: a terminal on the nadir line is on the beam axis
    sat = np.array([0.0, 0.0, 6378.0 + 600.0])
    site = np.array([0.0, 0.0, 6378.0])
    assert float(link.off_boresight_deg(sat, site)) == pytest.approx(0.0, abs=1e-12)


def test_off_boresight_law_of_sines():
    # Plain geometry on a sphere: terminal at (R, 0, 0), zenith = +x; the satellite at height h
    # seen at elevation e lies along u = (sin e, cos e, 0) at the slant range rho solving
    # |site + rho u| = R + h.  Law of sines in the Earth-centre/terminal/satellite triangle:
    # sin(theta) = R cos(e) / (R + h).  Tolerance: floating point.
    r_km, h_km = 6371.0, 600.0
    e = np.radians(np.array([10.0, 25.0, 45.0, 70.0, 89.0]))
    rho = -r_km * np.sin(e) + np.sqrt((r_km * np.sin(e)) ** 2 + (r_km + h_km) ** 2 - r_km ** 2)
    site = np.array([r_km, 0.0, 0.0])
    sat = site + rho[:, None] * np.stack([np.sin(e), np.cos(e), np.zeros_like(e)], axis=-1)
    got = link.off_boresight_deg(sat, site)
    assert got.shape == (5,)  # broadcast (5, 3) with (3,)
    want = np.degrees(np.arcsin(r_km * np.cos(e) / (r_km + h_km)))
    assert np.allclose(got, want, atol=1e-9)


# ---- scan loss and noise ------------------------------------------------------------------------

def test_scan_loss_cos_law():
    # cos^x element-pattern law (common practice, antenna handbooks): 0 dB at the normal,
    # x * 10 log10 2 = 3.0103 x dB at 60 deg (cos 60 = 1/2).  Tolerance: floating point.
    got = link.scan_loss_db(np.array([0.0, 60.0]), 1.2)
    assert got[0] == pytest.approx(0.0, abs=1e-12)
    assert got[1] == pytest.approx(1.2 * 10 * math.log10(2.0), abs=1e-9)
    # at and beyond 90 deg the loss is large but finite (the cos floor)
    edge = link.scan_loss_db(np.array([90.0, 100.0]), 1.2)
    assert np.all(np.isfinite(edge)) and np.all(edge > 30.0)


def test_thermal_noise_minus_114_dbm_per_mhz():
    # -174 dBm/Hz + 10 log10(1 MHz) = -114 dBm at NF 0 (common practice).
    assert float(link.thermal_noise_dbm(1e6, 0.0)) == pytest.approx(-114.0, abs=1e-9)
    assert float(link.thermal_noise_dbm(30e6, 7.0)) == pytest.approx(-174 + 74.771 + 7, abs=1e-3)
    # kT0 from scipy.constants.k at T0 = 290 K is -173.98 dBm/Hz: the -174 convention is its
    # rounding, hence the 0.03 dB tolerance.
    kt0_dbm = 10 * math.log10(constants.k * 290.0 * 1e3)
    assert float(link.thermal_noise_dbm(1.0, 0.0)) == pytest.approx(kt0_dbm, abs=0.03)


# ---- layer-3 filter -----------------------------------------------------------------------------

def test_l3_alpha_ts38331():
    # TS 38.331 5.5.3.2: a = 1/2^(k/4); k = 4 -> 1/2, k = 8 -> 1/4, k = 0 -> 1 (no filtering).
    assert link.l3_alpha(4, 0.2) == pytest.approx(0.5, abs=1e-15)
    assert link.l3_alpha(8, 0.2) == pytest.approx(0.25, abs=1e-15)
    assert link.l3_alpha(0, 0.2) == 1.0
    assert link.l3_alpha(0, 0.05) == 1.0


def test_l3_alpha_preserves_time_constant():
    # TS 38.331 5.5.3.2: the filter's time characteristics are preserved at other input rates.
    # Step input (0 dB then 10 dB from t = 1 s) filtered at 200 ms with a = 1/2 and at 50 ms with
    # the adapted a'.  The remaining error of a first-order filter decays geometrically; over
    # 1 s both must decay by (1 - a)^(1 s / 0.2 s) = 1/32 (hand formula).  Tolerance: floating
    # point.
    resp = {}
    for dt in (0.2, 0.05):
        t = np.round(np.arange(0.0, 4.0, dt), 9)
        m = np.where(t >= 1.0, 10.0, 0.0)
        f, _ = link.l3_filter_segments(m, np.zeros(t.size, bool), link.l3_alpha(4, dt))
        resp[dt] = dict(zip(t, f))
        err = {tt: 10.0 - ff for tt, ff in zip(t, f)}
        assert err[2.4] / err[1.4] == pytest.approx(1 / 32, rel=1e-9)
    # At matching times the two responses agree to within one 200 ms sample: the coarse
    # filter at t - 0.2 s <= fine filter at t <= coarse filter at t (sampling-step tolerance).
    for tt in np.round(np.arange(1.2, 3.8, 0.2), 9):
        assert resp[0.2][round(tt - 0.2, 9)] - 1e-9 <= resp[0.05][tt] <= resp[0.2][tt] + 1e-9


def _hand_filter(m, starts, a, initial=None):
    """Independent reference: the TS 38.331 recursion written out as a loop."""
    out = np.empty(len(m))
    last = []
    f = initial
    for n, (mn, st) in enumerate(zip(m, starts)):
        if n > 0 and st:
            last.append(f)
        if (st or n == 0) and not (n == 0 and initial is not None):
            f = mn  # F_0 = M_1 at each segment start
        else:
            f = (1 - a) * f + a * mn
        out[n] = f
    last.append(f)
    return out, np.array(last)


def _hand_ar1(z, starts, rho, initial=None):
    """Independent reference: the AR(1) recursion written out as a loop."""
    s = math.sqrt(1 - rho * rho)
    out = np.empty(len(z))
    last = []
    x = initial
    for n, (zn, st) in enumerate(zip(z, starts)):
        if n > 0 and st:
            last.append(x)
        if (st or n == 0) and not (n == 0 and initial is not None):
            x = zn
        else:
            x = rho * x + s * zn
        out[n] = x
    last.append(x)
    return out, np.array(last)


def _small_case():
    rng = np.random.default_rng(7)
    m = rng.normal(-100.0, 5.0, 23)
    starts = np.zeros(23, bool)
    starts[[0, 5, 6, 14]] = True  # includes a one-sample segment
    return m, starts


def test_l3_segments_equal_hand_loop():
    m, starts = _small_case()
    for a in (1.0, 0.5, 0.13):
        got, last = link.l3_filter_segments(m, starts, a)
        want, want_last = _hand_filter(m, starts, a)
        # tolerance: floating point (superposition vs. recursion, values ~ 100 dB)
        assert np.allclose(got, want, rtol=0, atol=1e-10)
        assert np.allclose(last, want_last, rtol=0, atol=1e-10)
    # carried-in state for the first segment
    cont = starts.copy()
    cont[0] = False
    got, last = link.l3_filter_segments(m, cont, 0.3, initial=-90.0)
    want, want_last = _hand_filter(m, cont, 0.3, initial=-90.0)
    assert np.allclose(got, want, rtol=0, atol=1e-10)
    assert np.allclose(last, want_last, rtol=0, atol=1e-10)


@pytest.mark.parametrize("split", [3, 6, 10])  # mid-segment, at a segment start, mid-segment
def test_l3_blockwise_with_carry_equals_whole(split):
    m, starts = _small_case()
    a = 0.3
    whole, whole_last = link.l3_filter_segments(m, starts, a)
    f1, last1 = link.l3_filter_segments(m[:split], starts[:split], a)
    carry = None if starts[split] else last1[-1]
    f2, last2 = link.l3_filter_segments(m[split:], starts[split:], a, initial=carry)
    # reference: the whole-series result; tolerance: floating point
    assert np.allclose(np.concatenate([f1, f2]), whole, rtol=0, atol=1e-10)
    joined_last = np.concatenate([last1 if carry is None else last1[:-1], last2])
    assert np.allclose(joined_last, whole_last, rtol=0, atol=1e-10)


def test_initial_with_marked_start_is_refused():
    with pytest.raises(ValueError):
        link.l3_filter_segments(np.zeros(3), np.array([True, False, False]), 0.5, initial=1.0)


# ---- AR(1) --------------------------------------------------------------------------------------

def test_ar1_segments_equal_hand_loop_and_carry():
    z, starts = _small_case()
    z = (z + 100.0) / 5.0
    for rho in (0.0, 0.6, 0.99):
        got, last = link.ar1_segments(z, starts, rho)
        want, want_last = _hand_ar1(z, starts, rho)
        assert np.allclose(got, want, rtol=0, atol=1e-12)  # floating point
        assert np.allclose(last, want_last, rtol=0, atol=1e-12)
    whole, _ = link.ar1_segments(z, starts, 0.8)
    x1, l1 = link.ar1_segments(z[:10], starts[:10], 0.8)
    x2, _ = link.ar1_segments(z[10:], starts[10:], 0.8, initial=l1[-1])
    assert np.allclose(np.concatenate([x1, x2]), whole, rtol=0, atol=1e-12)


def test_ar1_statistics():
    # Unit-variance AR(1): Var x = 1, lag-1 correlation rho (Box and Jenkins, AR(1) process).
    n, seg_len, rho = 200_000, 50_000, 0.9
    z = normal(12345, stream_id("test-ar1"), 0, np.arange(n))
    starts = np.arange(n) % seg_len == 0
    x, _ = link.ar1_segments(z, starts, rho)
    inside = ~starts[1:]  # lag-1 pairs within a segment
    r1 = np.corrcoef(x[:-1][inside], x[1:][inside])[0, 1]
    # Monte Carlo error: sd(r1) ~ sqrt((1 - rho^2) / n) = 1e-3 (Bartlett); 5 sd.
    assert r1 == pytest.approx(rho, abs=5e-3)
    # sd of the sample variance ~ sqrt(2/n * (1 + rho^2)/(1 - rho^2)) = 0.0098; 5 sd.
    assert x.var() == pytest.approx(1.0, abs=0.05)


def test_ar1_starts_stationary():
    # x_0 = z_0 makes every position of a segment N(0, 1) (stationary start), not only late ones.
    n_seg, seg_len = 50_000, 4
    z = normal(99, stream_id("test-ar1-start"), 0, np.arange(n_seg * seg_len))
    starts = np.arange(z.size) % seg_len == 0
    x, last = link.ar1_segments(z, starts, 0.95)
    per_pos = x.reshape(n_seg, seg_len).var(axis=0)
    # Monte Carlo error: sd of a sample variance of 50 000 normals = sqrt(2/50000) = 0.0063; 5 sd.
    assert np.allclose(per_pos, 1.0, atol=0.032)
    assert last.shape == (n_seg,)


# ---- the [link] table and the budget ------------------------------------------------------------

def test_check_table_defaults():
    p = link.check_table({}, "demo.toml")
    assert set(p) == set(link.KEYS)
    assert p["l3_filter_k"] == 4  # TS 38.331 QuantityConfigNR default fc4
    assert p["q_in_sinr_db"] >= p["q_out_sinr_db"]


def test_old_snr_key_names_still_read_with_a_warning():
    # the keys were renamed when radio link monitoring moved to SINR; the old spelling stays
    # accepted (contract) and says so
    said = []
    p = link.check_table({"q_out_snr_db": -9.0, "q_in_snr_db": -7.0}, "demo.toml", said.append)
    assert p["q_out_sinr_db"] == -9.0 and p["q_in_sinr_db"] == -7.0
    assert len(said) == 2 and all("q_out_sinr_db" in s or "q_in_sinr_db" in s for s in said)


@pytest.mark.parametrize("raw, key", [
    ({"frequncy_ghz": 2.0}, "link.frequncy_ghz"),
    ({"frequency_ghz": -1.0}, "link.frequency_ghz"),
    ({"subcarrier_spacing_khz": 45}, "link.subcarrier_spacing_khz"),
    ({"l3_filter_k": 10}, "link.l3_filter_k"),  # not in TS 38.331 FilterCoefficient
    ({"q_in_sinr_db": -10.0, "q_out_sinr_db": -8.0}, "link.q_in_sinr_db"),
    ({"q_in_snr_db": -10.0, "q_out_snr_db": -8.0}, "link.q_in_sinr_db"),
    ({"preset": "no-such-preset"}, "link.preset"),
    ({"bandwidth_mhz": 1.0, "subcarrier_spacing_khz": 240}, "link.bandwidth_mhz"),
])
def test_check_table_rejects(raw, key):
    with pytest.raises(InputError) as err:
        link.check_table(raw, "demo.toml")
    msg = str(err.value)
    assert "\n" not in msg and msg.startswith("demo.toml: ") and key in msg


def test_budget_at_boresight_zenith_hand_computed():
    # Hand budget with TR 38.821-like S-band spot-beam values (formulas of the link-budget
    # structure of TR 38.821, from memory): zenith pass at 600 km, boresight, no scan loss.
    #   FSPL (P.525, exact constant 32.448): 32.448 + 66.021 + 55.563 = 154.032 dB
    #   RSRP = 34 + 30 + 10 log10(0.015) - 154.032 = 64 - 18.239 - 154.032 = -108.271 dBm
    #   SNR  = (64 + 14.771 - 154.032) - (-174 + 74.771 + 7) = -75.261 + 92.229 = 16.968 dB
    # Tolerance 0.002 dB: rounding of the hand terms to 3 decimals.
    spot_beam = {"eirp_density_dbw_mhz": 34.0, "sat_max_gain_dbi": 30.0, "sat_aperture_m": 2.0,
                 "bandwidth_mhz": 30.0, "terminal_gain_dbi": 0.0, "noise_figure_db": 7.0}
    model = link.LinkModel(link.check_table(spot_beam, "demo.toml"))
    b = model.budget(600.0, 90.0, 0.0, -0.5)
    assert float(b["fspl_db"]) == pytest.approx(154.032, abs=2e-3)
    assert float(b["sat_gain_dbi"]) == pytest.approx(30.0, abs=1e-12)
    assert float(b["scan_loss_db"]) == pytest.approx(0.0, abs=1e-12)
    assert float(b["rsrp_dbm"]) == pytest.approx(-108.271, abs=2e-3)
    assert float(b["snr_db"]) == pytest.approx(16.968, abs=2e-3)
    assert float(b["delay_ms"]) == pytest.approx(600e3 / C_M_S * 1e3, rel=1e-12)
    assert float(b["doppler_hz"]) == pytest.approx(2e9 * 0.5e3 / C_M_S, rel=1e-12)


def test_budget_broadcast_and_per_re_snr():
    model = link.LinkModel({"other_losses_db": 2.0, "bandwidth_mhz": 30.0})
    rng_km = np.linspace(600.0, 2000.0, 4)[:, None]
    elev = np.array([90.0, 40.0, 20.0])
    b = model.budget(rng_km, elev, np.array([0.0, 5.0, 10.0]))
    for key in ("fspl_db", "sat_gain_dbi", "scan_loss_db", "rsrp_dbm", "snr_db", "delay_ms",
                "doppler_hz"):
        assert b[key].shape == (4, 3)
    assert np.all(np.isnan(b["doppler_hz"]))  # no range rate given
    # Flat power density (common practice): SNR over the band equals RSRP over the noise of
    # one subcarrier, -174 + 10 log10(15 kHz) + NF.  Tolerance: floating point.
    noise_re = -174.0 + 10 * math.log10(15e3) + 7.0
    assert np.allclose(b["snr_db"], b["rsrp_dbm"] - noise_re, atol=1e-9)


def test_shadowing_rho():
    # exp(-dt / T) correlation of an exponentially correlated (Gudmundson-type) shadowing
    # process (Gudmundson, Electronics Letters 1991); 10 s at 1 s -> e^-0.1.
    model = link.LinkModel({})
    assert model.shadowing_rho(1.0) == pytest.approx(math.exp(-0.1), rel=1e-15)
