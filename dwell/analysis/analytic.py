"""Closed-form results that simulated rates are compared against.

Returns plain numbers (numpy arrays where inputs broadcast): visibility-cap size, slant range and
delay, mean number in view and probability of none for random and inclined constellations, pass
rate and duration, Poisson-Voronoi handover rate, the distribution of the steepest obstruction
along a street, and exact Poisson confidence intervals.  Every function is O(1) except
:func:`walker_mean_in_view`, one adaptive quadrature (about a millisecond).

Conventions: spherical Earth; angles in radians unless the name says ``_deg``; ``psi0`` is the
Earth-central half-angle of the visibility cap (the set of satellite directions, seen from the
Earth's centre, above the terminal's elevation mask).

More formulas live beside this module, each with its derivation in ``docs/``:
:mod:`.nearest_rate` (exact nearest-satellite handover rate on an isotropic shell),
:mod:`.shells` (pass rate and duration of inclined and isotropic shells with Earth rotation,
in-view count laws, several shells), :mod:`.until_lost` (until-lost handover rate),
:mod:`.sinr_coverage` (SINR coverage), :mod:`.lattice` (hexagonal lattice crossings).
"""

from __future__ import annotations

import numpy as np
from scipy.integrate import quad
from scipy.stats import chi2

from ..orbits.frames import MEAN_EARTH_RADIUS_KM, SPEED_OF_LIGHT_KM_S

# ---- geometry of one satellite shell -----------------------------------------------------------

def cap_half_angle_rad(elevation_deg: np.ndarray | float, orbit_radius_km: np.ndarray | float,
                       earth_radius_km: float = MEAN_EARTH_RADIUS_KM) -> np.ndarray:
    """Earth-central half-angle ``psi0 = arccos(R cos e / r) - e`` of the visibility cap (rad).

    Source: plane triangle Earth centre - terminal - satellite (sine rule), as in orbital-geometry
    textbooks (e.g. Wertz and Larson, Space Mission Analysis and Design, ch. 5).  Assumes a
    spherical Earth of radius ``earth_radius_km`` and a terminal on its surface; ``e`` is the
    elevation mask (deg), ``r`` the orbit radius (km, from the Earth's centre).
    """
    e = np.radians(elevation_deg)
    return np.arccos(earth_radius_km * np.cos(e) / np.asarray(orbit_radius_km, dtype=float)) - e


def slant_range_km(elevation_deg: np.ndarray | float, altitude_km: np.ndarray | float,
                   earth_radius_km: float = MEAN_EARTH_RADIUS_KM) -> np.ndarray:
    """Terminal-satellite distance ``sqrt((R+h)^2 - R^2 cos^2 e) - R sin e`` (km).

    Source: law of cosines in the same triangle; the form used by 3GPP TR 38.821 (NTN
    solutions) for its slant-range and delay tables.  Spherical Earth, ``R`` = 6371 km default
    as in those tables; ``e`` elevation (deg), ``h`` altitude above the sphere (km).
    """
    e = np.radians(elevation_deg)
    r = earth_radius_km + np.asarray(altitude_km, dtype=float)
    return np.sqrt(r * r - (earth_radius_km * np.cos(e)) ** 2) - earth_radius_km * np.sin(e)


def max_round_trip_delay_ms(elevation_deg: np.ndarray | float, altitude_km: np.ndarray | float,
                            earth_radius_km: float = MEAN_EARTH_RADIUS_KM) -> np.ndarray:
    """Worst-case round-trip propagation delay of a transparent (bent-pipe) payload (ms).

    ``4 d / c``: terminal -> satellite -> gateway and back, terminal and gateway both at the
    cap's edge at elevation ``e`` (slant range ``d`` each way), as in 3GPP TR 38.821's delay
    table.  Propagation only: no processing, no atmosphere.
    """
    d = slant_range_km(elevation_deg, altitude_km, earth_radius_km)
    return 4.0 * d / SPEED_OF_LIGHT_KM_S * 1e3


def orbit_angular_rate_rad_s(altitude_km: np.ndarray | float, mu: float = 398600.4418,
                             equatorial_radius_km: float = 6378.137) -> np.ndarray:
    """Mean motion ``sqrt(mu / a^3)`` (rad/s) of a circular orbit, ``a = R_eq + h`` (km).

    Source: Kepler's third law for a two-body circular orbit (no J2); ``mu`` in km^3/s^2
    (WGS-84 value by default).  Inertial rate: the Earth's rotation is not removed.
    """
    a = equatorial_radius_km + np.asarray(altitude_km, dtype=float)
    return np.sqrt(mu / a ** 3)


def longest_polar_pass_s(psi0: np.ndarray | float, omega_rad_s: np.ndarray | float) -> np.ndarray:
    """Longest pass ``2 psi0 / omega`` (s): a terminal at a pole, a polar circular orbit.

    The orbit's great circle passes through the terminal's zenith, so the satellite crosses the
    whole cap diameter ``2 psi0`` at angular rate ``omega`` (orbital-geometry textbooks, e.g.
    Space Mission Analysis and Design).  Earth rotation does not move a polar terminal's zenith.
    """
    return 2.0 * np.asarray(psi0, dtype=float) / np.asarray(omega_rad_s, dtype=float)


# ---- isotropic constellation (binomial point process on the shell) ---------------------------

def isotropic_mean_in_view(n_sat: int | np.ndarray, psi0: np.ndarray | float) -> np.ndarray:
    """Mean number in view ``N (1 - cos psi0) / 2`` for N independent uniform satellites.

    Source: the area fraction of a spherical cap of half-angle ``psi0`` is ``(1 - cos psi0)/2``
    (Archimedes' hat-box theorem); each satellite is in view with that probability.
    """
    return np.asarray(n_sat, dtype=float) * (1.0 - np.cos(psi0)) / 2.0


def isotropic_p_none(n_sat: int | np.ndarray, psi0: np.ndarray | float) -> np.ndarray:
    """Probability that none of N independent uniform satellites is in view:
    ``((1 + cos psi0)/2)^N`` (binomial point process; cap area fraction as above)."""
    return ((1.0 + np.cos(psi0)) / 2.0) ** np.asarray(n_sat, dtype=float)


def isotropic_pass_rate_per_s(n_sat: int | np.ndarray, psi0: np.ndarray | float,
                              omega_rad_s: np.ndarray | float) -> np.ndarray:
    """Mean rate of pass starts ``N omega sin(psi0) / (2 pi)`` (1/s).

    Boundary-flux argument: each satellite flies a uniformly random great circle (normal uniform
    on the sphere).  That circle meets the cap iff the terminal's direction lies within
    ``psi0`` of it, i.e. ``|cos(angle to the normal)| < sin psi0``; the cosine of a uniform
    direction's angle is uniform on [-1, 1], so the probability is ``sin psi0``, and a circle
    that meets the cap gives one pass per revolution (period ``2 pi / omega``).  Assumes a
    non-rotating Earth or a polar terminal (otherwise the terminal's motion adds flux; the
    rotating form is :func:`dwell.analysis.shells.isotropic_pass_rate_per_s`).
    """
    return np.asarray(n_sat, dtype=float) * omega_rad_s * np.sin(psi0) / (2.0 * np.pi)


def isotropic_mean_pass_duration_s(psi0: np.ndarray | float,
                                   omega_rad_s: np.ndarray | float) -> np.ndarray:
    """Mean pass duration ``pi tan(psi0/2) / omega`` (s), same assumptions as the pass rate.

    Little's law / renewal argument: mean number in view = pass rate x mean duration, so the
    duration is ``[N (1-cos psi0)/2] / [N omega sin psi0 / (2 pi)] = pi tan(psi0/2) / omega``.
    """
    return np.pi * np.tan(np.asarray(psi0, dtype=float) / 2.0) / omega_rad_s


# ---- inclined circular orbits -----------------------------------------------------------------

def _longitude_fraction(sin_lat: float, lat_t: float, cos_psi0: float) -> float:
    """Fraction of the latitude circle ``sin_lat`` lying inside the cap around latitude lat_t."""
    cos_lat = np.sqrt(max(0.0, 1.0 - sin_lat * sin_lat))
    num = cos_psi0 - sin_lat * np.sin(lat_t)
    den = cos_lat * np.cos(lat_t)
    if den < 1e-15:  # a pole: the circle is a point, wholly inside or outside
        return 1.0 if num <= 0.0 else 0.0
    return float(np.arccos(np.clip(num / den, -1.0, 1.0)) / np.pi)


def walker_mean_in_view(n_sat: int, inclination_deg: float, terminal_lat_deg: float,
                        psi0: float) -> float:
    """Time-averaged mean number in view for N satellites on circular orbits of inclination i.

    Assumptions: circular orbits, each satellite's argument of latitude uniform over time, and
    longitude uniform relative to the terminal (nodes spread uniformly, or Earth rotation
    averaging a long run); spherical Earth; the visibility cap has Earth-central half-angle
    ``psi0`` (rad) about a terminal at latitude ``terminal_lat_deg``.

    Source: the latitude density of a circular orbit of inclination i,
    ``p(phi) = cos(phi) / (pi sqrt(sin^2 i - sin^2 phi))`` for ``|phi| < i`` (satellite-
    constellation handbooks), times the fraction of each latitude circle inside the cap,
    integrated over latitude.  The substitution ``sin(phi) = sin(i) sin(u)`` (u the argument of
    latitude on the ascending half) gives ``p(phi) dphi = du / pi`` and removes the
    inverse-square-root singularity at ``|phi| = i``.  Retrograde i uses ``180 - i``; caps over a
    pole take the whole latitude circle; zero when the orbit never reaches the cap's latitudes.
    """
    if psi0 <= 0.0:
        return 0.0
    if psi0 >= np.pi:
        return float(n_sat)
    sin_i = abs(np.sin(np.radians(inclination_deg)))
    lat_t = np.radians(terminal_lat_deg)
    cos_psi0 = np.cos(psi0)
    lo = max(lat_t - psi0, -np.pi / 2)
    hi = min(lat_t + psi0, np.pi / 2)
    if sin_i < 1e-15:  # equatorial orbit: every satellite on the equator
        return float(n_sat) * (_longitude_fraction(0.0, lat_t, cos_psi0) if lo <= 0 <= hi else 0.0)
    i_eff = np.arcsin(min(sin_i, 1.0))
    a, b = max(lo, -i_eff), min(hi, i_eff)
    if a >= b:
        return 0.0

    def u_of(lat: float) -> float:
        return float(np.arcsin(np.clip(np.sin(lat) / sin_i, -1.0, 1.0)))

    u_a, u_b = u_of(a), u_of(b)
    # latitudes where the cap starts to hold whole latitude circles (cap over a pole): kinks
    kinks = [u_of(lat) for lat in (np.pi - lat_t - psi0, -np.pi - lat_t + psi0) if a < lat < b]
    integrand = lambda u: _longitude_fraction(sin_i * np.sin(u), lat_t, cos_psi0)  # noqa: E731
    val, _ = quad(integrand, u_a, u_b, points=kinks or None, limit=200,
                  epsabs=1e-12, epsrel=1e-10)
    return float(n_sat) * val / np.pi


# ---- handover in a Poisson-Voronoi tessellation ---------------------------------------------

def voronoi_handover_rate_per_s(speed: np.ndarray | float,
                                intensity: np.ndarray | float) -> np.ndarray:
    """Cell-boundary crossing rate ``4 v sqrt(lambda) / pi`` of a straight-moving user.

    Source: Lin, Ganti, Fleming and Andrews, "Towards understanding the fundamentals of mobility
    in cellular networks", IEEE Trans. Wireless Commun. 12(4), 2013: a planar Poisson-Voronoi
    tessellation of intensity ``lambda`` has mean edge length ``2 sqrt(lambda)`` per unit area,
    and a line meets edges ``2/pi`` times that per unit length.  Units: any consistent length
    unit L, ``speed`` in L/s and ``intensity`` in 1/L^2; the result is per second.
    """
    return 4.0 * np.asarray(speed, dtype=float) * np.sqrt(intensity) / np.pi


def nearest_satellite_handover_rate_per_s(n_sat: int | np.ndarray,
                                          orbit_radius_km: np.ndarray | float,
                                          omega_rad_s: np.ndarray | float) -> np.ndarray:
    """LOCAL APPROXIMATION to the rate at which the nearest (highest) satellite changes: the
    large-N planar limit of the exact rate
    (:func:`dwell.analysis.nearest_rate.isotropic_nearest_handover_rate_per_s`, which it
    exceeds by the factor ``1 / (1 - 5/(8N) + ...)``; docs/nearest-satellite-rate.md).

    Applies :func:`voronoi_handover_rate_per_s` in the tangent plane of the shell: N uniform
    satellites have intensity ``N / (4 pi r^2)`` per km^2 and move at ``omega r`` km/s, which
    gives ``4 omega sqrt(N / (4 pi)) / pi`` (``r`` cancels).  It is only an approximation:
    the shell is a sphere, not a plane (good when cells are small, N large), and the satellites
    do not move rigidly as one pattern past a fixed user (each follows its own orbit, so the
    tessellation deforms as it moves); Earth rotation of the terminal is neglected.
    """
    r = np.asarray(orbit_radius_km, dtype=float)
    intensity_per_km2 = np.asarray(n_sat, dtype=float) / (4.0 * np.pi * r * r)
    return voronoi_handover_rate_per_s(omega_rad_s * r, intensity_per_km2)


# ---- steepest obstruction along a street --------------------------------------------------------

def frechet_tan_cdf(t: np.ndarray | float, intensity_per_m: float,
                    mean_excess_height_m: float) -> np.ndarray:
    """P(steepest obstruction's elevation tangent <= t) = ``exp(-lambda E[(H-h)+] / t)``.

    Model: obstacles along a ray from the terminal at the points of a Poisson process of
    intensity ``lambda`` (1/m), independent heights H; one at distance x blocks up to tangent
    ``(H - h)/x`` above a terminal at height h.  The maximum of a Poisson-marked process is
    Frechet (Resnick, Extreme Values, Regular Variation and Point Processes, 1987):
    ``P(max <= t) = exp(-E[#points with (H-h)/x > t]) = exp(-lambda E[(H-h)+] / t)``, shape 1.
    ``mean_excess_height_m`` is ``E[(H-h)+]`` (m); zero for ``t <= 0``.
    """
    t = np.asarray(t, dtype=float)
    scale = intensity_per_m * mean_excess_height_m
    with np.errstate(divide="ignore"):
        return np.where(t > 0, np.exp(-scale / np.where(t > 0, t, 1.0)), 0.0)


def frechet_tan_median(intensity_per_m: float, mean_excess_height_m: float) -> float:
    """Median of the steepest obstruction's tangent, ``lambda E[(H-h)+] / ln 2`` (see the CDF)."""
    return intensity_per_m * mean_excess_height_m / np.log(2.0)


# ---- statistics ----------------------------------------------------------------------------

def poisson_rate_interval(count: int | np.ndarray, exposure: np.ndarray | float,
                          confidence: float = 0.95) -> tuple[np.ndarray, np.ndarray]:
    """Exact (Garwood 1936) two-sided interval for a Poisson rate: ``(lower, upper)``.

    ``lower = chi2.ppf(a/2, 2k) / (2 T)`` (0 when k = 0), ``upper = chi2.ppf(1 - a/2, 2k + 2) /
    (2 T)`` with ``a = 1 - confidence``, ``k`` the event count and ``T`` the exposure (e.g.
    seconds of simulated time; the rate is then per second).  Conservative: coverage >= the
    nominal level.
    """
    k = np.asarray(count, dtype=float)
    alpha = 1.0 - confidence
    lower = np.where(k > 0, chi2.ppf(alpha / 2.0, 2.0 * np.maximum(k, 1.0)) / 2.0, 0.0)
    upper = chi2.ppf(1.0 - alpha / 2.0, 2.0 * k + 2.0) / 2.0
    return lower / exposure, upper / exposure


def mean_excess_height_m(law: str, mean_m: float, antenna_height_m: float, *, sigma: float = 0.5,
                         shape: float = 2.5, values=None, weights=None) -> float:
    """E[(H - h)+] for the building-height laws of the street-canyon generator (closed forms).

    exponential: mean exp(-h/mean); deterministic: (H0 - h)+; lognormal with E[H] = mean and
    log-sd sigma: mean Phi(d1) - h Phi(d2), d1 = (mu + sigma^2 - ln h) / sigma, d2 = d1 - sigma,
    mu = ln(mean) - sigma^2/2 (the partial expectation of a lognormal, as in option pricing);
    Pareto type I with tail index a and scale x_m = mean (a-1)/a: mean - h for h <= x_m, else
    x_m^a h^(1-a) / (a - 1); empirical: the weighted average of (v - h)+.
    """
    from scipy.stats import norm

    h = float(antenna_height_m)
    if law == "exponential":
        return mean_m * float(np.exp(-max(h, 0.0) / mean_m)) if h > 0 else mean_m - h
    if law == "deterministic":
        return max(mean_m - h, 0.0)
    if law == "lognormal":
        if h <= 0:
            return mean_m - h
        mu = np.log(mean_m) - sigma ** 2 / 2
        d1 = (mu + sigma ** 2 - np.log(h)) / sigma
        return float(mean_m * norm.cdf(d1) - h * norm.cdf(d1 - sigma))
    if law == "pareto":
        xm = mean_m * (shape - 1.0) / shape
        return mean_m - h if h <= xm else float(xm ** shape * h ** (1 - shape) / (shape - 1))
    if law == "empirical":
        v = np.asarray(values, dtype=float)
        w = np.ones_like(v) if weights is None else np.asarray(weights, dtype=float)
        return float(np.sum(w * np.clip(v - h, 0, None)) / np.sum(w))
    raise ValueError(f"unknown law {law!r}")
