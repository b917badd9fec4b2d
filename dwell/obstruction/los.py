"""Statistical line-of-sight for studies without obstruction geometry.

Returns, per satellite sample, whether the path is line-of-sight (LOS) under the elevation-
dependent LOS probability of the 3GPP non-terrestrial-network channel model, with blockages that
come in runs rather than independent coin flips.

Model: for each satellite, a latent unit-variance Gaussian AR(1) process
``x_n = rho x_{n-1} + sqrt(1 - rho^2) z_n`` (``rho = exp(-step_s / decorrelation_s)``) restarts
from ``x = z`` at the first sample of every visibility segment; the sample is LOS iff
``Phi(x_n) < P_LOS(elevation_n)`` (a Gaussian copula).  Because ``x_n`` is standard normal at
every sample, ``P(LOS)`` equals the table value exactly at every sample; the latent correlation
makes LOS and non-LOS runs whose length grows with ``decorrelation_s``.

Cost: one ``scipy.signal.lfilter`` pass and a few vector operations per call, O(samples).
"""

from __future__ import annotations

import numpy as np
from scipy.signal import lfilter
from scipy.special import ndtr

from ..io.schema import REQUIRED, Field, ge, gt, number, seed as seed_field, text
from ..radio import noise

# 3GPP TR 38.811, Table 6.6.1-1 (LOS probability for NTN), values from memory.
ELEVATION_DEG = np.arange(10.0, 91.0, 10.0)
LOS_PROBABILITY: dict[str, np.ndarray] = {
    "dense-urban": np.array([28.2, 33.1, 39.8, 46.8, 53.7, 61.2, 73.8, 82.0, 98.1]) / 100.0,
    "urban": np.array([24.6, 38.6, 49.3, 61.3, 72.6, 80.5, 91.9, 96.8, 99.2]) / 100.0,
    "suburban": np.array([78.2, 86.9, 91.9, 92.9, 93.5, 94.0, 94.9, 95.2, 99.8]) / 100.0,
}
ENVIRONMENTS = ("dense-urban", "urban", "suburban")

STREAM = noise.stream_id("los")

KEYS: dict[str, Field] = {
    "environment": text(REQUIRED, choices=ENVIRONMENTS,
                        doc="LOS probability table of 3GPP TR 38.811 (suburban covers rural)"),
    "decorrelation_s": number(10.0, gt(0),
                              doc="time constant of the latent process; sets blockage run lengths"),
    "step_s": number(1.0, gt(0), doc="sample spacing of the latent process"),
    "seed": seed_field(),
    "nlos_loss_db": Field((int, float), None, (ge(0),),
                          "extra loss of a non-LOS path; unset: a non-LOS satellite is blocked"),
}


def los_probability(environment: str, elevation_deg: np.ndarray | float) -> np.ndarray:
    """LOS probability (fraction) at the given elevations.

    Rule: linear interpolation between the table's 10-degree points; held at the 10 deg value
    below 10 deg and at the 90 deg value above 90 deg.
    """
    try:
        table = LOS_PROBABILITY[environment]
    except KeyError:
        raise ValueError(f"unknown environment {environment!r}; choose one of "
                         + ", ".join(ENVIRONMENTS)) from None
    return np.interp(np.asarray(elevation_deg, dtype=float), ELEVATION_DEG, table)


def lag_correlation(step_s: float, decorrelation_s: float) -> float:
    """Lag-1 correlation ``rho = exp(-step_s / decorrelation_s)`` of the latent process."""
    return float(np.exp(-step_s / decorrelation_s))


def draw_innovations(seed: int, key: np.ndarray | int, index: np.ndarray | int) -> np.ndarray:
    """Chunking-independent standard-normal innovations, e.g. key = satellite, index = step."""
    return noise.normal(seed, STREAM, key, index)


def _latent(innovations: np.ndarray, segment_start: np.ndarray, rho: float,
            initial: float | None) -> np.ndarray:
    """The restarted AR(1) over concatenated segments, without a per-sample Python loop.

    One filter pass ``y_n = rho y_{n-1} + c z_n`` (c = sqrt(1 - rho^2)) runs through every
    boundary; inside a segment starting at s the wanted ``x_n = rho^(n-s) z_s + c sum_{k=s+1..n}
    rho^(n-k) z_k`` equals ``y_n + rho^(n-s) (z_s - y_s)``, so the restart is one correction.
    Samples before the first start continue ``initial`` (``y`` is seeded with it).
    """
    z = innovations
    n = z.size
    c = np.sqrt(max(0.0, 1.0 - rho * rho))
    zi = np.array([rho * initial]) if initial is not None else np.zeros(1)
    y, _ = lfilter([c], [1.0, -rho], z, zi=zi)
    idx = np.arange(n)
    start = np.maximum.accumulate(np.where(segment_start, idx, -1))
    inside = start >= 0
    s = start[inside]
    x = y.copy()
    x[inside] += np.power(rho, idx[inside] - s) * (z[s] - y[s])
    return x


def latent_process(innovations: np.ndarray, segment_start: np.ndarray, rho: float,
                   initial: float | None = None) -> np.ndarray:
    """The restarted latent AR(1) itself (see :func:`los_states`); ``initial`` continues the
    first segment when ``segment_start[0]`` is False."""
    start = np.asarray(segment_start, dtype=bool).copy()
    if initial is None and start.size:
        start[0] = True
    return _latent(np.asarray(innovations, dtype=float), start, float(rho),
                   None if (start.size == 0 or start[0]) else float(initial))


def is_los(environment: str, elevation_deg: np.ndarray, latent: np.ndarray) -> np.ndarray:
    """LOS flags from latent values: Phi(x) < P_LOS(elevation)."""
    return ndtr(latent) < los_probability(environment, elevation_deg)


def los_states(environment: str, elevation_deg: np.ndarray, innovations: np.ndarray,
               segment_start: np.ndarray, rho: float,
               initial: float | None = None) -> tuple[np.ndarray, float | None]:
    """LOS flags for many concatenated visibility segments; returns ``(los, last_state)``.

    ``elevation_deg``, ``innovations`` (standard normals, e.g. :func:`draw_innovations`) and
    ``segment_start`` (True at each segment's first sample) are 1-D and equally long.  ``rho`` is
    the lag-1 correlation (:func:`lag_correlation`).  ``initial`` is the latent value at the
    sample before this block when the first segment continues one from a previous block; it is
    used only if ``segment_start[0]`` is False (with ``initial=None`` the first sample starts
    afresh).  ``last_state`` is the latent value at the final sample, to pass as ``initial`` to
    the next block (``initial`` itself for an empty block).
    """
    elevation_deg = np.asarray(elevation_deg, dtype=float)
    z = np.asarray(innovations, dtype=float)
    start = np.asarray(segment_start, dtype=bool).copy()
    if not (elevation_deg.shape == z.shape == start.shape) or z.ndim != 1:
        raise ValueError("elevation_deg, innovations and segment_start must be equal-length 1-D")
    if not 0.0 <= rho <= 1.0:
        raise ValueError(f"rho must be in [0, 1], got {rho}")
    if z.size == 0:
        return np.zeros(0, dtype=bool), initial
    if initial is None:
        start[0] = True
    x = _latent(z, start, float(rho), None if start[0] else float(initial))
    los = ndtr(x) < los_probability(environment, elevation_deg)
    return los, float(x[-1])
