"""Link model of one terminal-satellite sample: path loss, antenna gains, RSRP, SNR, delay, Doppler.

Everything is a pure, vectorised numpy function of broadcast arrays, plus :class:`LinkModel`, which
binds the checked ``[link]`` table (:data:`KEYS`, :func:`check_table`) and returns the whole
deterministic budget for arrays of range, elevation and off-boresight angle.  Random parts
(log-normal shadowing, measurement noise) are not applied here: callers draw counter-based
innovations (:mod:`dwell.radio.noise`) and shape them with :func:`ar1_segments`; RSRP smoothing uses the
3GPP layer-3 filter, :func:`l3_filter_segments`.

Cost: a few transcendental functions per sample for the budget (one Bessel J1 for the satellite
pattern); the two segmented recursions are one ``scipy.signal.lfilter`` pass plus O(N) gathers,
with no Python loop over samples.
"""

from __future__ import annotations

from typing import Any, Callable

import numpy as np
from scipy.signal import lfilter
from scipy.special import j1

from ..io.errors import InputError
from ..io.schema import Field, between, ge, gt, le, number
from ..io.schema import check_table as _check_spec
from ..orbits.frames import SPEED_OF_LIGHT_KM_S
from .procedure import LINK_KEYS as PROCEDURE_LINK_KEYS

C_KM_S = SPEED_OF_LIGHT_KM_S  # speed of light (exact, SI definition)
KT0_DBM_HZ = -174.0  # thermal noise density kT0 at T0 = 290 K, the usual rounding of -173.98
_COS_FLOOR = 1e-4  # scan-loss floor: cos(90 deg) -> 40 dB per unit exponent, large but finite
_X_SMALL = 1e-6  # below this k a sin(theta), 2 J1(x)/x = 1 - x^2/8 is 1 to double precision


# ---- propagation --------------------------------------------------------------------------------

def fspl_db(distance_km: np.ndarray | float, frequency_ghz: np.ndarray | float) -> np.ndarray:
    """Free-space basic transmission loss, ITU-R P.525: ``L_bf = 20 log10(4 pi d / lambda)`` dB.

    Evaluated exactly (lambda = c / f); P.525's rounded form 32.4 + 20 log10 f_MHz + 20 log10 d_km
    differs from it by the constant's rounding (the exact constant is 32.448).
    """
    d_m = np.asarray(distance_km, dtype=float) * 1e3
    lam_m = C_KM_S * 1e3 / (np.asarray(frequency_ghz, dtype=float) * 1e9)
    return 20.0 * np.log10(4.0 * np.pi * d_m / lam_m)


def one_way_delay_ms(range_km: np.ndarray | float) -> np.ndarray:
    """Free-space propagation delay over ``range_km``, in milliseconds."""
    return np.asarray(range_km, dtype=float) / C_KM_S * 1e3


def doppler_hz(range_rate_km_s: np.ndarray | float, frequency_ghz: np.ndarray | float) -> np.ndarray:
    """First-order Doppler shift ``-f rdot / c``: positive while the satellite approaches
    (``range_rate_km_s`` < 0)."""
    f_hz = np.asarray(frequency_ghz, dtype=float) * 1e9
    return -f_hz * np.asarray(range_rate_km_s, dtype=float) / C_KM_S


T0_K = 290.0         # reference temperature of the noise figure (IEEE definition)


def thermal_noise_dbm(bandwidth_hz: np.ndarray | float, noise_figure_db: np.ndarray | float,
                      antenna_temperature_k: float = T0_K) -> np.ndarray:
    """Receiver noise power ``k T_sys B`` in dBm, with the system noise temperature
    ``T_sys = T_ant + (F - 1) T0`` referred to the antenna terminals (F the noise factor,
    T0 = 290 K; the usual receiver-noise cascade, e.g. Pozar, Microwave Engineering, ch. 10).

    Written ``-174 dBm/Hz (kT0) + 10 log10(T_sys / T0) + 10 log10 B``; with T_ant = T0 this is
    the familiar ``-174 + 10 log10 B + NF``.
    """
    nf = np.asarray(noise_figure_db, dtype=float)
    t_ant = np.asarray(antenna_temperature_k, dtype=float)
    t_sys = t_ant + (10.0 ** (nf / 10.0) - 1.0) * T0_K
    # at T_ant = T0 the term is NF itself: take it as given (no round trip through 10^x)
    excess_db = np.where(t_ant == T0_K, nf, 10.0 * np.log10(np.maximum(t_sys, 1e-12) / T0_K))
    return KT0_DBM_HZ + 10.0 * np.log10(np.asarray(bandwidth_hz, dtype=float)) + excess_db


def noise_from_g_over_t_dbm(bandwidth_hz: np.ndarray | float, g_over_t_db_k: float,
                            gain_dbi: float) -> np.ndarray:
    """Noise power ``k T_sys B`` (dBm) for a receiver quoted by its figure of merit G/T:
    ``T_sys = G / (G/T)`` with G the antenna gain the budget applies."""
    t_sys_dbk = gain_dbi - g_over_t_db_k
    return KT0_DBM_HZ + 10.0 * np.log10(np.asarray(bandwidth_hz, dtype=float)) \
        + t_sys_dbk - 10.0 * np.log10(T0_K)


# ---- antennas -----------------------------------------------------------------------------------

def satellite_gain_dbi(theta_deg: np.ndarray | float, aperture_m: float, frequency_ghz: float,
                       max_gain_dbi: float) -> np.ndarray:
    """Satellite antenna reference pattern of 3GPP TR 38.811, section 6.4.1, in dBi.

    ``G(theta) = G_max * 4 |J1(k a sin theta) / (k a sin theta)|^2`` for 0 < |theta| <= 90 deg and
    ``G_max`` at theta = 0, with ``a`` the aperture radius (``aperture_m`` is the diameter) and
    ``k = 2 pi f / c``.  This is the pattern of a uniformly illuminated circular aperture; its
    nulls are clipped to the smallest positive float so the result stays finite.  Angles beyond
    90 deg (outside the pattern's domain, never reached by a nadir-pointing beam seeing the
    Earth) are held at the 90 deg value rather than letting sin(theta) fold back to the peak.
    """
    k_per_m = 2.0 * np.pi * np.asarray(frequency_ghz, dtype=float) * 1e9 / (C_KM_S * 1e3)
    theta = np.minimum(np.abs(np.asarray(theta_deg, dtype=float)), 90.0)
    x = k_per_m * (0.5 * np.asarray(aperture_m, dtype=float)) * np.sin(np.radians(theta))
    small = x < _X_SMALL
    x_safe = np.where(small, 1.0, x)  # no 0/0 at boresight
    ratio = np.where(small, 1.0, 2.0 * j1(x_safe) / x_safe)  # 2 J1(x)/x -> 1 as x -> 0
    rel = np.maximum(ratio * ratio, np.finfo(float).tiny)
    return np.asarray(max_gain_dbi, dtype=float) + 10.0 * np.log10(rel)


def off_boresight_deg(sat_r_km: np.ndarray, site_r_km: np.ndarray) -> np.ndarray:
    """Angle (deg) at the satellite between its nadir (towards the Earth's centre: a
    nadir-pointing beam) and the direction to the terminal; vectors broadcast over ``(..., 3)``."""
    sat = np.asarray(sat_r_km, dtype=float)
    nadir = -sat
    to_site = np.asarray(site_r_km, dtype=float) - sat
    nadir, to_site = np.broadcast_arrays(nadir, to_site)
    # atan2(|a x b|, a.b) stays accurate near 0 where arccos of the cosine would not; the
    # cross product by components (np.cross's own formula, without its axis shuffling)
    a0, a1, a2 = nadir[..., 0], nadir[..., 1], nadir[..., 2]
    b0, b1, b2 = to_site[..., 0], to_site[..., 1], to_site[..., 2]
    c0 = a1 * b2 - a2 * b1
    c1 = a2 * b0 - a0 * b2
    c2 = a0 * b1 - a1 * b0
    cross = np.sqrt(c0 * c0 + c1 * c1 + c2 * c2)
    dot = np.einsum("...i,...i->...", nadir, to_site)
    return np.degrees(np.arctan2(cross, dot))


def scan_loss_db(scan_deg: np.ndarray | float, exponent: float) -> np.ndarray:
    """Flat-panel terminal scan loss ``-10 x log10(cos(scan))`` dB (positive = loss).

    ``scan_deg`` is measured from the panel normal; for a zenith-facing panel it is
    ``90 - elevation``.  The cos^x element-pattern law is common practice (antenna handbooks).
    ``cos`` is floored at 1e-4 so 90 deg (and beyond) gives a large finite loss, 40 x dB.
    """
    c = np.maximum(np.cos(np.radians(np.asarray(scan_deg, dtype=float))), _COS_FLOOR)
    return 0.0 - 10.0 * float(exponent) * np.log10(c)  # 0.0 - : no -0.0 at the normal


# ---- layer-3 filter and AR(1) over segments -----------------------------------------------------

def l3_alpha(k: int, period_s: float, l1_period_s: float = 0.2) -> float:
    """Weight ``a`` of the 3GPP TS 38.331 (section 5.5.3.2) layer-3 filter for samples every
    ``period_s``.

    TS 38.331 gives ``a = 1 / 2^(k/4)`` for a filter fed once per L1 measurement period
    (``l1_period_s``; 200 ms is the TS 38.133 value, from memory) and asks that the filter's time
    characteristics be preserved at other input rates.  For a sample period ``dt`` we therefore use
    ``a' = 1 - (1 - a)^(dt / l1_period)``: the memory ``(1 - a')`` per sample then decays by the
    same ``(1 - a)`` per L1 period, i.e. the same time constant ``-l1_period / ln(1 - a)``.
    ``k = 0`` means no filtering (``a = 1``).
    """
    if period_s <= 0 or l1_period_s <= 0:
        raise ValueError("period_s and l1_period_s must be > 0")
    a = 1.0 / 2.0 ** (k / 4.0)
    return float(1.0 - (1.0 - a) ** (period_s / l1_period_s))


def _segments(n: int, segment_start: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Start index of each segment (sample 0 always starts one) and each sample's offset in it."""
    starts = np.asarray(segment_start, dtype=bool).reshape(-1)
    if starts.shape[0] != n:
        raise ValueError("segment_start must have one flag per sample")
    starts = starts.copy()
    starts[0] = True
    start_idx = np.flatnonzero(starts)
    seg_of = np.cumsum(starts) - 1
    return start_idx, seg_of


def _first_order_segments(u: np.ndarray, pole: float, start_idx: np.ndarray, seg_of: np.ndarray,
                          state0: np.ndarray) -> np.ndarray:
    """``y_n = pole y_(n-1) + u_n`` restarted at each segment start ``s`` with ``y_(s-1) = state0``.

    One unsegmented lfilter pass ``Y``, then superposition of the linear recursion: inside the
    segment starting at ``s`` the true output is ``Y_n + pole^(n-s+1) (state0 - Y_(s-1))``.
    Every term is bounded by the input's range, so this loses no precision.
    """
    if u.shape[0] == 0:
        return np.zeros(0)
    y = lfilter([1.0], [1.0, -pole], u)
    y_before = np.where(start_idx > 0, y[np.maximum(start_idx - 1, 0)], 0.0)
    offset = np.arange(u.shape[0]) - start_idx[seg_of]
    # pole^(offset + 1) from a table of powers: the same pow() values, a gather instead of a
    # pow per sample (the largest cost of the filter otherwise)
    powers = np.power(pole, np.arange(1.0, float(offset.max()) + 2.0))
    return y + powers[offset] * (state0 - y_before)[seg_of]


def _as_series(values: np.ndarray) -> np.ndarray:
    v = np.asarray(values, dtype=float)
    if v.ndim != 1:
        raise ValueError("expected a 1-D series (concatenate independent series, mark each start)")
    return v


def _check_initial(initial: float | None, segment_start: np.ndarray) -> None:
    if initial is not None and np.asarray(segment_start, dtype=bool).reshape(-1)[0]:
        raise ValueError("initial given but sample 0 is marked as a new segment start")


def _carry_array(initial: float | None, n_segments: int) -> np.ndarray:
    carry = np.full(n_segments, np.nan)
    if initial is not None:
        carry[0] = float(initial)
    return carry


def l3_filter_blocks(values_db: np.ndarray, segment_start: np.ndarray, alpha: float,
                     carry: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Layer-3 filter over segments, each either fresh (``F_0 = M_1``) or continuing a filter
    state carried from a previous time block: ``carry`` holds one value per segment, NaN for a
    fresh start.  Returns the filtered series and the last state of each segment."""
    m = _as_series(values_db)
    if m.shape[0] == 0:
        return m.copy(), m.copy()
    start_idx, seg_of = _segments(m.shape[0], segment_start)
    carry = np.asarray(carry, dtype=float)
    if carry.shape != start_idx.shape:
        raise ValueError("carry needs one value per segment")
    # F_(s-1) that makes F_s = M_s:  (1 - a) F + a M = M  ->  F = M
    state0 = np.where(np.isnan(carry), m[start_idx], carry)
    f = _first_order_segments(float(alpha) * m, 1.0 - float(alpha), start_idx, seg_of, state0)
    end_idx = np.append(start_idx[1:] - 1, m.shape[0] - 1)
    return f, f[end_idx]


def l3_filter_segments(values_db: np.ndarray, segment_start: np.ndarray, alpha: float,
                       initial: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Layer-3 filter ``F_n = (1 - a) F_(n-1) + a M_n`` (TS 38.331 section 5.5.3.2) in dB,
    restarted with ``F_0 = M_1`` at every segment start.

    ``values_db`` is a 1-D series (independent series concatenated); ``segment_start`` flags the
    first sample of each segment (e.g. each satellite visibility window; sample 0 always starts
    one).  ``initial`` is the carried-in filter state ``F`` for the first segment when it
    continues from a previous time block (then ``segment_start[0]`` must be False), so block-wise
    filtering equals filtering the whole series.  Returns the filtered series and the last
    filter state of each segment, in order.
    """
    m = _as_series(values_db)
    if m.shape[0] == 0:
        return m.copy(), m.copy()
    _check_initial(initial, segment_start)
    start_idx, _ = _segments(m.shape[0], segment_start)
    return l3_filter_blocks(m, segment_start, alpha, _carry_array(initial, start_idx.size))


def ar1_blocks(innovations: np.ndarray, segment_start: np.ndarray, rho: float,
               carry: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Unit-variance AR(1) over segments, each fresh (``x_0 = z_0``) or continuing a carried
    state (``x_0 = rho carry + sqrt(1 - rho^2) z_0``); ``carry`` as in
    :func:`l3_filter_blocks`."""
    z = _as_series(innovations)
    if z.shape[0] == 0:
        return z.copy(), z.copy()
    rho = float(rho)
    if not -1.0 <= rho <= 1.0:
        raise ValueError("rho must be in [-1, 1]")
    s = np.sqrt(1.0 - rho * rho)
    start_idx, seg_of = _segments(z.shape[0], segment_start)
    carry = np.asarray(carry, dtype=float)
    if carry.shape != start_idx.shape:
        raise ValueError("carry needs one value per segment")
    fresh = np.isnan(carry)
    u = s * z
    # a fresh start is stationary, x_s = z_s: zero state plus u_s = z_s
    u[start_idx[fresh]] = z[start_idx[fresh]]
    state0 = np.where(fresh, 0.0, carry)
    x = _first_order_segments(u, rho, start_idx, seg_of, state0)
    end_idx = np.append(start_idx[1:] - 1, z.shape[0] - 1)
    return x, x[end_idx]


def ar1_segments(innovations: np.ndarray, segment_start: np.ndarray, rho: float,
                 initial: float | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Unit-variance AR(1) ``x_n = rho x_(n-1) + sqrt(1 - rho^2) z_n`` over segments.

    Each segment starts stationary, ``x_0 = z_0``, or, for a first segment carried in from a
    previous block, ``x_0 = rho initial + sqrt(1 - rho^2) z_0``.  With standard normal
    ``innovations`` (e.g. :func:`dwell.radio.noise.normal`) every sample is N(0, 1) with lag-1
    correlation ``rho``.  Same segment/carry conventions and return value as
    :func:`l3_filter_segments`.
    """
    z = _as_series(innovations)
    if z.shape[0] == 0:
        return z.copy(), z.copy()
    _check_initial(initial, segment_start)
    start_idx, _ = _segments(z.shape[0], segment_start)
    return ar1_blocks(z, segment_start, rho, _carry_array(initial, start_idx.size))


# ---- the [link] table ---------------------------------------------------------------------------

SUBCARRIER_SPACINGS_KHZ = (15, 30, 60, 120, 240)  # NR numerologies mu = 0..4 (TS 38.211)
FILTER_COEFFICIENTS = (0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 11, 13, 15, 17, 19)  # TS 38.331 FilterCoefficient

KEYS: dict[str, Field] = {
    "frequency_ghz": number(2.0, gt(0), le(300), doc="carrier frequency"),
    "eirp_density_dbw_mhz": number(20.0, between(-50, 100),
                                   doc="satellite EIRP density per MHz at beam peak "
                                       "(illustrative; TR 38.821 Table 6.1.1.1-1 quotes 34 for "
                                       "S-band LEO-600 spot beams, from memory)"),
    "bandwidth_mhz": number(10.0, gt(0), le(2000), doc="channel bandwidth"),
    "subcarrier_spacing_khz": Field((int,), 15, (), "NR subcarrier spacing",
                                    choices=SUBCARRIER_SPACINGS_KHZ),
    "sat_max_gain_dbi": number(6.0, between(0, 80),
                               doc="satellite antenna peak gain (illustrative wide beam; TR 38.821 "
                                   "spot beams: 30 dBi, from memory)"),
    "sat_aperture_m": number(0.1, gt(0), le(100),
                             doc="satellite antenna aperture diameter (illustrative wide beam: "
                                 "-3 dB near 56 deg off nadir at 2 GHz; TR 38.821 spot beams: 2 m)"),
    "sat_beam_pointing": Field((str,), "nadir", (), "nadir: one nadir-pointed beam, gain from the "
                               "TR 38.811 pattern at the off-nadir angle; terminal: the serving "
                               "beam points at the terminal (a multi-beam payload's best beam)",
                               choices=("nadir", "terminal")),
    "terminal_gain_dbi": number(20.0, between(-30, 60),
                                doc="terminal antenna gain at panel normal (illustrative flat panel)"),
    "scan_loss_exponent": number(1.2, between(0, 10),
                                 doc="x of the cos^x panel scan loss (common practice)"),
    "noise_figure_db": number(7.0, between(0, 30),
                              doc="terminal noise figure (handheld, TR 38.821, from memory)"),
    "antenna_temperature_k": number(290.0, between(0, 5000),
                                    doc="terminal antenna noise temperature (TR 38.821: 290 K "
                                        "handheld, 150 K VSAT, from memory)"),
    "g_over_t_db_k": Field((int, float), None, (between(-60, 60),),
                           "terminal G/T; when set it replaces noise figure and antenna "
                           "temperature (T_sys = G / (G/T))"),
    "other_losses_db": number(0.0, ge(0), le(200),
                              doc="atmospheric, polarisation and other losses, lumped"),
    "shadowing_std_db": number(0.0, between(0, 30), doc="log-normal shadowing std; 0 = off"),
    "shadowing_decorrelation_s": number(10.0, gt(0), doc="shadowing correlation time"),
    "measurement_noise_db": number(0.0, between(0, 30), doc="RSRP error std of each layer-1 "
                                   "measurement (one every l1_period_s); 0 = off"),
    "detection_sinr_db": Field((int, float), None, (between(-40, 40),),
                               "cells below this SINR are not detected, hence not measured "
                               "(TS 38.133 intra-frequency side condition SS-SINR >= -6 dB, "
                               "from memory); default: every cell near the terminal is measured"),
    "ssb_period_s": Field((int, float), 0.02, (),
                          "SSB (and RLM reference signal) periodicity; sets the radio link "
                          "monitoring cadence (TS 38.213 default 20 ms for initial access)",
                          choices=(0.005, 0.01, 0.02, 0.04, 0.08, 0.16)),
    "rlm_indication_s": Field((int, float), None, (between(0.001, 1.0),),
                              "interval between in-sync/out-of-sync indications (default "
                              "max(10 ms, ssb_period_s): TS 38.133 section 8.1, from memory)"),
    "rlm_evaluation_out_s": Field((int, float), None, (between(0.001, 10.0),),
                                  "window over which out-of-sync is judged (default max(200 ms, "
                                  "10 ssb_period_s): TS 38.133 section 8.1.2, from memory)"),
    "rlm_evaluation_in_s": Field((int, float), None, (between(0.001, 10.0),),
                                 "window over which in-sync is judged (default max(100 ms, "
                                 "5 ssb_period_s): TS 38.133 section 8.1.2, from memory)"),
    "l3_filter_k": Field((int,), 4, (), "TS 38.331 filterCoefficient k (0 = no filtering)",
                         choices=FILTER_COEFFICIENTS),
    "l1_period_s": number(0.2, gt(0), le(10), doc="L1 measurement period the k refers to"),
    "q_out_sinr_db": number(-8.0, between(-40, 40),
                            doc="radio link monitoring out-of-sync SINR (common practice, from "
                                "memory)"),
    "q_in_sinr_db": number(-6.0, between(-40, 40),
                           doc="radio link monitoring in-sync SINR (common practice, from memory)"),
    "interference": Field((bool,), None, (),
                          "co-channel interference from the beams of every satellite in view; "
                          "default: on when any constellation has a multi-beam layout"),
    "preset": Field((str,), None, (), "a named parameter set (see dwell.radio.presets); keys "
                    "given in the table override it"),
}

RENAMED = {"q_out_snr_db": "q_out_sinr_db", "q_in_snr_db": "q_in_sinr_db"}


KEYS.update(PROCEDURE_LINK_KEYS)   # payload and gateway: the handover procedure's delays


def check_table(raw: dict[str, Any], source: str,
                warn: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Check the ``[link]`` table against :data:`KEYS` (defaults filled) and cross-check keys.

    A ``preset`` fills the keys the table does not give (see :mod:`dwell.radio.presets`); the
    old names ``q_out_snr_db`` / ``q_in_snr_db`` are accepted with a warning (radio link
    monitoring judges SINR, so the keys are now ``q_out_sinr_db`` / ``q_in_sinr_db``).
    """
    from .presets import PRESETS

    if not isinstance(raw, dict):
        raise InputError(source, "link", raw, "must be a table")
    raw = dict(raw)
    for old, new in RENAMED.items():
        if old in raw:
            if new in raw:
                raise InputError(source, f"link.{old}", raw[old],
                                 f"give {new} only ({old} is its old name)")
            if warn is not None:
                warn(f"warning: {source}: link.{old} is now link.{new} (radio link monitoring "
                     "judges SINR); read as such")
            raw[new] = raw.pop(old)
    preset = raw.get("preset")
    if preset is not None:
        if not isinstance(preset, str) or preset not in PRESETS:
            raise InputError(source, "link.preset", preset,
                             "unknown preset (known: " + ", ".join(sorted(PRESETS)) + ")")
        raw = {**PRESETS[preset].values, **raw}
    out = _check_spec(raw, KEYS, source, "link")
    ssb = float(out["ssb_period_s"])
    for key, value in (("rlm_indication_s", max(0.01, ssb)),
                       ("rlm_evaluation_out_s", max(0.2, 10 * ssb)),
                       ("rlm_evaluation_in_s", max(0.1, 5 * ssb))):
        if out[key] is None:
            out[key] = value
    if out["q_in_sinr_db"] < out["q_out_sinr_db"]:
        raise InputError(source, "link.q_in_sinr_db", out["q_in_sinr_db"],
                         f"must be >= link.q_out_sinr_db ({out['q_out_sinr_db']:g})")
    rb_mhz = 12 * out["subcarrier_spacing_khz"] / 1000.0  # one resource block
    if out["bandwidth_mhz"] < rb_mhz:
        raise InputError(source, "link.bandwidth_mhz", out["bandwidth_mhz"],
                         f"must hold at least one resource block ({rb_mhz:g} MHz at "
                         f"{out['subcarrier_spacing_khz']} kHz spacing)")
    return out


class LinkModel:
    """The deterministic link budget for one checked ``[link]`` table (see :func:`check_table`).

    Missing keys take their defaults from :data:`KEYS`.
    """

    def __init__(self, params: dict[str, Any]):
        p = {key: f.default for key, f in KEYS.items()}
        p.update(params)
        self.params = p
        self.frequency_ghz = float(p["frequency_ghz"])

    def shadowing_rho(self, period_s: float) -> float:
        """Lag-one correlation of shadowing sampled every ``period_s``:
        ``exp(-period_s / shadowing_decorrelation_s)``."""
        return float(np.exp(-period_s / float(self.params["shadowing_decorrelation_s"])))

    def noise_dbm(self) -> float:
        """Receiver noise over the channel bandwidth (dBm): from G/T when given, else from the
        noise figure and the antenna temperature."""
        p = self.params
        bw_hz = p["bandwidth_mhz"] * 1e6
        if p.get("g_over_t_db_k") is not None:
            return float(noise_from_g_over_t_dbm(bw_hz, p["g_over_t_db_k"], p["terminal_gain_dbi"]))
        return float(thermal_noise_dbm(bw_hz, p["noise_figure_db"], p["antenna_temperature_k"]))

    def budget(self, range_km: np.ndarray, elevation_deg: np.ndarray, off_boresight_deg: np.ndarray,
               range_rate_km_s: np.ndarray | None = None, *, gain_dbi: np.ndarray | None = None,
               max_gain_dbi: np.ndarray | float | None = None) -> dict[str, np.ndarray]:
        """Budget terms for broadcast arrays of slant range, terminal elevation and satellite
        off-boresight angle.

        With ``G_rel = sat_gain_dbi - sat_max_gain_dbi`` (the EIRP density is quoted at beam peak)
        and ``common = G_rel + terminal_gain_dbi - scan_loss_db - fspl_db - other_losses_db``:

        - ``rsrp_dbm = eirp_density_dbw_mhz + 30 + 10 log10(subcarrier_spacing_khz / 1000) +
          common``: received power per resource element (the EIRP density scaled to one
          subcarrier);
        - ``snr_db = (eirp_density_dbw_mhz + 30 + 10 log10(bandwidth_mhz) + common) -
          thermal_noise_dbm(bandwidth, noise_figure_db)``: power over the whole band over noise
          over the band (equal to the per-RE SNR for a flat power density).

        The scan angle is ``90 - elevation`` (zenith-facing panel).  ``doppler_hz`` is NaN when no
        range rate is given.  No shadowing or measurement noise is applied here.  A multi-beam
        payload passes each beam's gain towards the terminal (``gain_dbi``) and the beams' peak
        gain (``max_gain_dbi``) instead of the ``[link]`` antenna.
        """
        p = self.params
        rdot = np.nan if range_rate_km_s is None else range_rate_km_s
        rng, elev, theta, rdot = np.broadcast_arrays(
            *(np.asarray(v, dtype=float) for v in (range_km, elevation_deg, off_boresight_deg, rdot)))
        f_ghz = self.frequency_ghz
        loss = fspl_db(rng, f_ghz)
        if gain_dbi is not None:
            gain = np.broadcast_to(np.asarray(gain_dbi, dtype=float), rng.shape)
            g_max = np.asarray(max_gain_dbi, dtype=float)
        else:
            if p["sat_beam_pointing"] == "terminal":
                theta = np.zeros_like(theta)
            gain = satellite_gain_dbi(theta, p["sat_aperture_m"], f_ghz, p["sat_max_gain_dbi"])
            g_max = p["sat_max_gain_dbi"]
        scan = scan_loss_db(90.0 - elev, p["scan_loss_exponent"])
        common = (gain - g_max) + p["terminal_gain_dbi"] - scan - loss - p["other_losses_db"]
        eirp_dbm_mhz = p["eirp_density_dbw_mhz"] + 30.0
        rsrp = eirp_dbm_mhz + 10.0 * np.log10(p["subcarrier_spacing_khz"] / 1000.0) + common
        rx_dbm = eirp_dbm_mhz + 10.0 * np.log10(p["bandwidth_mhz"]) + common
        snr = rx_dbm - self.noise_dbm()
        dop = doppler_hz(rdot, f_ghz)  # NaN in, NaN out when no range rate is given
        return {"fspl_db": loss, "sat_gain_dbi": gain, "scan_loss_db": scan, "rsrp_dbm": rsrp,
                "snr_db": snr, "delay_ms": one_way_delay_ms(rng), "doppler_hz": dop}
