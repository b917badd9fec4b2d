"""Exact handover rate of nearest-satellite association on an isotropic shell.

Model (derivation in ``docs/nearest-satellite-rate.md``): N independent satellites, each on its
own circular orbit of one radius with a uniformly random orbit normal and a uniformly random
phase (at every instant a binomial point process on the shell), all at angular rate ``omega``;
a terminal on the sphere, standing (optionally carried by the Earth's rotation at angular rate
``terminal_rate_rad_s`` about the Earth's centre); association to the nearest satellite, i.e.
the smallest Earth-central angle ``psi`` (for one radius the same as highest elevation and
shortest range), with no hysteresis.

Result: the nearest satellite changes at the rate

    Lambda(psi_c) = E|psi_i' - psi_j'| * N (N - 1) / 2 * B(N - 1/2, 3/2) * (1 - I_x0(N - 1/2, 3/2))

with ``x0 = (1 + cos psi_c) / 2``, ``B`` the beta function and ``I`` the regularised incomplete
beta function; ``psi_c = pi`` counts every change, ``psi_c`` = the visibility cap's half-angle
counts changes between satellites in view.  For a standing terminal ``E|psi_i' - psi_j'| =
8 omega / pi^2``; a moving terminal adds its own term (a one-dimensional Bessel integral).  As
N grows the rate tends to ``2 omega sqrt(N) / pi^(3/2)``, the planar Poisson-Voronoi crossing
rate of :func:`dwell.analysis.analytic.nearest_satellite_handover_rate_per_s`; the ratio is
``Gamma(N - 1/2) / (sqrt(N) Gamma(N - 1)) = 1 - 5 / (8 N) + O(N^-2)``.

Cost: O(1) (special functions) for a standing terminal; one adaptive quadrature (about a
millisecond) when the terminal moves.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.integrate import quad
from scipy.special import betainc, betaln, gammaln, j0


def mean_abs_rate_difference(omega_rad_s: float, terminal_rate_rad_s: float = 0.0) -> float:
    """``E|psi_i' - psi_j'|`` (rad/s) for two satellites at equal central angle from the terminal.

    Each satellite's central angle changes at ``omega cos(alpha)`` with ``alpha`` its heading
    relative to the terminal, uniform and independent; a terminal moving at angular rate ``v``
    adds ``-v cos(beta)`` with ``beta`` the satellite's bearing from the terminal relative to the
    terminal's motion, uniform and independent again.  So ``X = omega (cos a1 - cos a2) -
    v (cos b1 - cos b2)``, a sum of four independent terms with characteristic functions
    ``J0(omega t)`` and ``J0(v t)``, and ``E|X| = (2/pi) int_0^inf (1 - J0(omega t)^2 J0(v t)^2)
    / t^2 dt`` (the first-absolute-moment formula for a symmetric law).  For ``v = 0`` this is
    ``8 omega / pi^2`` exactly (``E|cos a1 - cos a2| = 2 E|sin u| E|sin w| = 8 / pi^2`` with
    ``u, w`` independent uniform).  Cost: O(1) for ``v = 0``, else one quadrature.
    """
    w, v = abs(float(omega_rad_s)), abs(float(terminal_rate_rad_s))
    if v == 0.0 or w == 0.0:
        return 8.0 * max(w, v) / math.pi ** 2
    scale = max(w, v)
    a, b = w / scale, v / scale
    upper = 400.0
    val, _ = quad(lambda t: (1.0 - (j0(a * t) * j0(b * t)) ** 2) / (t * t), 0.0, upper,
                  limit=2000, epsabs=1e-11, epsrel=1e-10)
    # tail beyond `upper`: 1/upper from the 1, minus the mean of J0^2 J0^2 / t^2 (< 1e-5 here)
    return float(2.0 / math.pi * (val + 1.0 / upper) * scale)


def isotropic_nearest_handover_rate_per_s(n_sat: int, omega_rad_s: float,
                                          psi_c: float = math.pi,
                                          terminal_rate_rad_s: float = 0.0) -> float:
    """Rate (1/s) at which the nearest of N isotropic satellites changes, exact for the model in
    the module docstring.

    ``psi_c`` (rad): count only changes that happen with both satellites within central angle
    ``psi_c`` of the terminal (the visibility cap's half-angle: changes between satellites in
    view, which is what a nearest-satellite policy counts as handovers); ``pi`` counts all.
    ``terminal_rate_rad_s``: the terminal's own angular rate about the Earth's centre (Earth
    rotation: ``7.2921e-5 cos(latitude)``); 0 for a standing terminal on a non-rotating Earth.
    Cost: O(1), plus one quadrature when the terminal moves.
    """
    n = int(n_sat)
    if n < 2 or psi_c <= 0.0:
        return 0.0
    x0 = (1.0 + math.cos(min(psi_c, math.pi))) / 2.0
    # N (N-1)/2 * int_0^psi_c f(psi)^2 S(psi)^(N-2) dpsi = N (N-1)/2 * B(N-1/2, 3/2) (1 - I_x0)
    log_pairs = math.log(n) + math.log(n - 1) - math.log(2.0) + betaln(n - 0.5, 1.5)
    tail = 1.0 - float(betainc(n - 0.5, 1.5, x0)) if x0 > 0.0 else 1.0
    return float(mean_abs_rate_difference(omega_rad_s, terminal_rate_rad_s)
                 * math.exp(log_pairs) * tail)


def planar_limit_ratio(n_sat: int | np.ndarray) -> np.ndarray:
    """Exact all-changes rate over the planar Poisson-Voronoi rate ``2 omega sqrt(N) / pi^(3/2)``:
    ``Gamma(N - 1/2) / (sqrt(N) Gamma(N - 1))``, which is ``1 - 5/(8N) + O(1/N^2)`` and tends to
    1 as N grows (standing terminal).  O(1)."""
    n = np.asarray(n_sat, dtype=float)
    return np.exp(gammaln(n - 0.5) - gammaln(n - 1.0) - 0.5 * np.log(n))
