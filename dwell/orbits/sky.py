"""Where every satellite is: chunked SGP4 propagation plus Hermite interpolation in between.

SGP4 (``sgp4.api.SatrecArray``) is evaluated for all satellites on a coarse grid (default 300 s
for LEO), one time chunk at a time so memory stays bounded for any duration.  Between grid points
positions come from quintic Hermite interpolation on position, SGP4's velocity and a two-body+J2
acceleration: on a 550 km circular shell this stays within about 1 m of SGP4 at a 300 s grid
(measured against 1 s SGP4 output; about 10 m for an eccentricity of 0.02), so fine-grained geometry never needs the whole shell at 1 s.

Cost: one SGP4 call per satellite per grid point (about 0.5 us each on this class of machine),
plus ~20 flops per interpolated sample.
"""

from __future__ import annotations

import math
from collections import OrderedDict
from dataclasses import dataclass
from typing import Callable

import numpy as np
from sgp4.api import SGP4_ERRORS, SatrecArray

from ..constellations import Constellation
from .timebase import Epoch

# WGS-72 constants, as SGP4 itself uses (Vallado et al. 2006)
_MU = 398600.8
_RE = 6378.135
_J2 = 0.001082616


def gravity_acceleration(r: np.ndarray) -> np.ndarray:
    """Two-body + J2 acceleration (km/s^2) for TEME positions (km), shape (..., 3)."""
    x, y, z = r[..., 0], r[..., 1], r[..., 2]
    r2 = x * x + y * y + z * z
    rn = np.sqrt(r2)
    k = 1.5 * _J2 * _MU * _RE ** 2 / (r2 * r2 * rn)
    zz = 5.0 * z * z / r2
    mu_r3 = _MU / (r2 * rn)
    return np.stack([x * (-mu_r3 + k * (zz - 1.0)), y * (-mu_r3 + k * (zz - 1.0)),
                     z * (-mu_r3 + k * (zz - 3.0))], axis=-1)


def default_step_s(constellation: Constellation) -> float:
    """Grid spacing: 1/19 of the shortest (perigee-scaled) period, capped at 300 s, >= 10 s."""
    period = constellation.shortest_period_s()
    if not math.isfinite(period):
        return 300.0
    return float(min(300.0, max(10.0, math.floor(period / 19.0))))


def _hermite_weights(s: np.ndarray) -> np.ndarray:
    """Quintic Hermite basis on [0, 1] for (r0, h v0, h^2 a0, r1, h v1, h^2 a1); shape (..., 6).

    Each weight is evaluated in the order of its formula, ``1 - 10 s^3 + 15 s^4 - 6 s^5`` and
    so on, left to right, in place into one array (the hot path of pass finding: the same
    values as the plain expressions, a fifth of the time)."""
    s = np.asarray(s, dtype=float)
    s2 = s * s
    s3 = s2 * s
    s4 = s3 * s
    s5 = s4 * s
    out = np.empty((6,) + s.shape)
    t = np.empty_like(s)
    o = out[0, ...]                     # 1 - 10 s3 + 15 s4 - 6 s5
    np.multiply(10, s3, out=t)
    np.subtract(1, t, out=o)
    np.multiply(15, s4, out=t)
    o += t
    np.multiply(6, s5, out=t)
    o -= t
    o = out[1, ...]                     # s - 6 s3 + 8 s4 - 3 s5
    np.multiply(6, s3, out=t)
    np.subtract(s, t, out=o)
    np.multiply(8, s4, out=t)
    o += t
    np.multiply(3, s5, out=t)
    o -= t
    o = out[2, ...]                     # 0.5 (s2 - 3 s3 + 3 s4 - s5)
    np.multiply(3, s3, out=t)
    np.subtract(s2, t, out=o)
    np.multiply(3, s4, out=t)
    o += t
    o -= s5
    o *= 0.5
    o = out[3, ...]                     # 10 s3 - 15 s4 + 6 s5
    np.multiply(10, s3, out=o)
    np.multiply(15, s4, out=t)
    o -= t
    np.multiply(6, s5, out=t)
    o += t
    o = out[4, ...]                     # -4 s3 + 7 s4 - 3 s5
    np.multiply(-4, s3, out=o)
    np.multiply(7, s4, out=t)
    o += t
    np.multiply(3, s5, out=t)
    o -= t
    o = out[5, ...]                     # 0.5 (s3 - 2 s4 + s5)
    np.multiply(2, s4, out=t)
    np.subtract(s3, t, out=o)
    o += s5
    o *= 0.5
    return np.moveaxis(out, 0, -1)


def _hermite_rate_weights(s: np.ndarray) -> np.ndarray:
    """d/ds of :func:`_hermite_weights`."""
    s2 = s * s
    s3 = s2 * s
    s4 = s3 * s
    return np.stack([-30 * s2 + 60 * s3 - 30 * s4, 1 - 18 * s2 + 32 * s3 - 15 * s4,
                     0.5 * (2 * s - 9 * s2 + 12 * s3 - 5 * s4), 30 * s2 - 60 * s3 + 30 * s4,
                     -12 * s2 + 28 * s3 - 15 * s4, 0.5 * (3 * s2 - 8 * s3 + 5 * s4)], axis=-1)


def _segments_of(key: np.ndarray, cost: int) -> tuple[np.ndarray, np.ndarray]:
    """Distinct (satellite, interval) keys and each sample's segment: runs of equal keys when
    the samples come grouped (measurement rows come window by window, so a sort is wasted
    work), else np.unique.  A key split over several runs only computes its table twice."""
    if key.size:
        change = np.empty(key.size, bool)
        change[0] = True
        np.not_equal(key[1:], key[:-1], out=change[1:])
        n_runs = int(np.count_nonzero(change))
        run_key = key[change]
        # runs are the segments when no key comes back in a later run (checked on the few
        # run keys), or when the repeats cost less than a sort (a table per run costs `cost`)
        if n_runs * cost <= 2 * key.size or np.unique(run_key).size == n_runs:
            return run_key, np.cumsum(change) - 1
    return np.unique(key, return_inverse=True)


@dataclass
class SkyChunk:
    """Satellite TEME states on the (evenly spaced) grid of one time chunk [t0_s, t1_s]."""

    index: int
    t0_s: float
    t1_s: float
    grid_s: np.ndarray        # (n,)
    r_km: np.ndarray          # (S, n, 3)
    v_km_s: np.ndarray        # (S, n, 3)
    a_km_s2: np.ndarray       # (S, n, 3)
    valid: np.ndarray         # (S,) bool: SGP4 succeeded over the whole chunk

    def __post_init__(self):
        self.h_s = float(self.grid_s[1] - self.grid_s[0])
        h = self.h_s
        # r, h v, h^2 a side by side: one gather per interval end instead of three
        self._pack = np.concatenate([self.r_km, self.v_km_s * h, self.a_km_s2 * (h * h)], axis=-1)
        self._fine: dict[int, np.ndarray] = {}

    def interval_of(self, t_s: np.ndarray) -> np.ndarray:
        i = np.floor((np.asarray(t_s) - self.t0_s) / self.h_s).astype(np.int64)
        return np.clip(i, 0, self.grid_s.size - 2)

    def states(self, sat: np.ndarray, t_s: np.ndarray, *, velocity: bool = True
               ) -> tuple[np.ndarray, np.ndarray | None]:
        """Quintic Hermite TEME position (and velocity) of satellites ``sat`` at times ``t_s``.

        ``sat`` and ``t_s`` broadcast to one shape; the result has that shape plus (3,).
        Times must lie in [t0_s, t1_s].
        """
        sat, t_s = np.broadcast_arrays(np.asarray(sat), np.asarray(t_s, dtype=float))
        i = self.interval_of(t_s)
        s = (t_s - self.grid_s[i]) / self.h_s
        # rows of the flattened pack by np.take: the same values as _pack[sat, i], 2x faster
        flat = self._pack.reshape(-1, 9)
        f = sat.astype(np.int64) * self.grid_s.size + i
        p0 = np.take(flat, f, axis=0)
        p1 = np.take(flat, f + 1, axis=0)
        w = _hermite_weights(s)
        # w0 r0 + w1 h v0 + ... + w5 h^2 a1, summed left to right in place
        pos = w[..., 0:1] * p0[..., 0:3]
        term = np.empty_like(pos)
        for k, p, a in ((1, p0, 3), (2, p0, 6), (3, p1, 0), (4, p1, 3), (5, p1, 6)):
            np.multiply(w[..., k:k + 1], p[..., a:a + 3], out=term)
            pos += term
        if not velocity:
            return pos, None
        d = _hermite_rate_weights(s) / self.h_s
        vel = (d[..., 0:1] * p0[..., 0:3] + d[..., 1:2] * p0[..., 3:6] + d[..., 2:3] * p0[..., 6:9]
               + d[..., 3:4] * p1[..., 0:3] + d[..., 4:5] * p1[..., 3:6] + d[..., 5:6] * p1[..., 6:9])
        return pos, vel

    def positions_on_grid(self, sat: np.ndarray, t_s: np.ndarray, step_s: float) -> np.ndarray:
        """Positions at instants on a global grid k * step_s that divides the SGP4 spacing.

        Samples of one (satellite, interval) share the interval's Hermite data and one of
        h/step fractional offsets, so each segment is one small matrix product instead of
        per-sample gathers (about 10x faster for dense sampling).  Falls back to
        :meth:`states` when the grids are not aligned.
        """
        return self._on_grid(sat, t_s, step_s, rate=False)

    def velocities_on_grid(self, sat: np.ndarray, t_s: np.ndarray, step_s: float) -> np.ndarray:
        """Velocities (the Hermite interpolant's derivative) at grid instants, as
        :meth:`positions_on_grid` computes positions."""
        return self._on_grid(sat, t_s, step_s, rate=True)

    def _on_grid(self, sat: np.ndarray, t_s: np.ndarray, step_s: float, rate: bool) -> np.ndarray:
        sat = np.asarray(sat)
        t_s = np.asarray(t_s, dtype=float)
        q = self.h_s / step_s

        def fallback(sat_, t_):
            pos, vel = self.states(sat_, t_, velocity=rate)
            return vel if rate else pos

        if sat.size == 0 or abs(q - round(q)) > 1e-9 or abs(self.t0_s / step_s
                                                             - round(self.t0_s / step_s)) > 1e-6:
            return fallback(sat, t_s)
        q = int(round(q))
        i = self.interval_of(t_s)
        j = np.rint((t_s - self.grid_s[i]) / step_s).astype(np.int64)
        off = np.abs(t_s - (self.grid_s[i] + j * step_s)) > 1e-6 * step_s
        j = np.clip(j, 0, q)     # j == q is the interval's end point (last chunk instant)
        if off.mean() > 0.5:     # mostly off the grid (bisection probes): per-sample path
            return fallback(sat, t_s)
        n_int = self.grid_s.size - 1
        seg, inv = _segments_of(sat.astype(np.int64) * n_int + i, q + 1)
        s_sat, s_int = seg // n_int, seg % n_int
        frac = np.arange(q + 1) / q
        w = _hermite_rate_weights(frac) / self.h_s if rate else _hermite_weights(frac)  # (q+1, 6)
        out = np.empty(t_s.shape + (3,))
        batch = max(1, 4_000_000 // (3 * (q + 1)))
        for a in range(0, seg.size, batch):      # bounded memory: batches of segments
            b = min(seg.size, a + batch)
            p0 = self._pack[s_sat[a:b], s_int[a:b]].reshape(b - a, 3, 3)
            p1 = self._pack[s_sat[a:b], s_int[a:b] + 1].reshape(b - a, 3, 3)
            blocks = np.concatenate([p0, p1], axis=1)                    # (n, 6, 3)
            table = np.matmul(w[None, :, :], blocks)                    # (n, q+1, 3)
            if a == 0 and b == seg.size:         # one batch: every sample, no mask
                out[...] = table[inv, j]
                break
            m = (inv >= a) & (inv < b)
            out[m] = table[inv[m] - a, j[m]]
        if off.any():                            # instants that are not on the grid after all
            out[off] = fallback(sat[off], t_s[off])
        return out

    def directions(self) -> tuple[np.ndarray, np.ndarray]:
        """Unit position vectors, component by component (3, S, n: each component contiguous,
        so a terminal's screening reads three plain arrays), and each satellite's largest
        radius in the chunk (S,): what screening needs, computed once for all terminals."""
        if getattr(self, "_dirs", None) is None:
            r = np.linalg.norm(self.r_km, axis=-1)
            unit = self.r_km / r[..., None]
            self._dirs = (np.ascontiguousarray(np.moveaxis(unit, -1, 0)), r.max(axis=1))
        return self._dirs

    def sub_positions(self, sat: np.ndarray, interval: np.ndarray, per_interval: int
                      ) -> np.ndarray:
        """Positions at ``per_interval`` + 1 evenly spaced points of grid intervals (both ends
        included), for the given (satellite, interval) pairs: shape (pairs, q + 1, 3).

        Computed on first request and kept for the chunk, so terminals that screen the same
        satellites share the work; memory is reserved lazily (untouched pages cost nothing).
        """
        q = int(per_interval)
        n_sat, n_int = self.r_km.shape[0], self.grid_s.size - 1
        if getattr(self, "_sub_q", None) != q:
            self._sub_q = q
            self._sub = np.empty((n_sat, n_int, q + 1, 3))
            self._sub_done = np.zeros((n_sat, n_int), dtype=bool)
            self._sub_w = _hermite_weights(np.arange(q + 1) / q)           # (q+1, 6)
        need = ~self._sub_done[sat, interval]
        if need.any():
            key = np.unique(sat[need].astype(np.int64) * n_int + interval[need])
            ns, ni = key // n_int, key % n_int
            p0 = self._pack[ns, ni].reshape(-1, 3, 3)
            p1 = self._pack[ns, ni + 1].reshape(-1, 3, 3)
            blocks = np.concatenate([p0, p1], axis=1)                       # (k, 6, 3)
            self._sub[ns, ni] = np.matmul(self._sub_w[None], blocks)
            self._sub_done[ns, ni] = True
        return self._sub[sat, interval]


class Propagator:
    """Vectorised SGP4 over the whole constellation; failing satellites are dropped, not fatal."""

    def __init__(self, constellation: Constellation, epoch: Epoch,
                 warn: Callable[[str], None] | None = None):
        self.constellation = constellation
        self.epoch = epoch
        self.warn = warn or (lambda msg: None)
        # one array: sgp4's loop holds the GIL, so threads would not help (measured)
        self._array = SatrecArray([s.satrec for s in constellation.satellites])
        self.failed: dict[int, tuple[float, int]] = {}   # satellite -> (first bad t_s, code)

    def propagate(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """TEME r (km), v (km/s) with shape (S, n, 3), and per-satellite validity (S,)."""
        jd, fr = self.epoch.julian(t_s)
        err, r, v = self._array.sgp4(jd, fr)
        bad = err != 0
        valid = ~bad.any(axis=1)
        for s in np.flatnonzero(~valid):
            s = int(s)
            if s not in self.failed:
                k = int(np.argmax(bad[s]))
                code = int(err[s, k])
                self.failed[s] = (float(t_s[k]), code)
                name = self.constellation.satellites[s].name
                self.warn(f"warning: satellite {name} cannot be propagated from "
                          f"t = {t_s[k]:.0f} s (SGP4 error {code}: "
                          f"{SGP4_ERRORS.get(code, 'unknown')}); excluded from then on")
        # a satellite that failed once stays out, even if a later sample looks fine
        for s in self.failed:
            valid[s] = False
        r[~valid] = np.nan
        v[~valid] = np.nan
        return r, v, valid

    def close(self) -> None:
        """Nothing to release (kept for symmetry with :meth:`Sky.close`)."""


def chunk_grid(t0_s: float, t1_s: float, step_s: float) -> np.ndarray:
    """Grid from t0 to t1 inclusive with spacing at most ``step_s`` (evenly spread)."""
    n = max(1, math.ceil((t1_s - t0_s) / step_s - 1e-9))
    return np.linspace(t0_s, t1_s, n + 1)


class Sky:
    """Chunked satellite states for a scenario; keeps the most recent chunks in memory."""

    def __init__(self, constellation: Constellation, epoch: Epoch, duration_s: float, *,
                 step_s: float | None = None, chunk_s: float = 21600.0,
                 warn: Callable[[str], None] | None = None, keep: int = 2):
        self.constellation = constellation
        self.epoch = epoch
        self.duration_s = float(duration_s)
        self.step_s = float(step_s or default_step_s(constellation))
        # chunks hold a whole number of grid steps
        self.chunk_s = max(self.step_s, math.floor(chunk_s / self.step_s) * self.step_s)
        self.n_chunks = max(1, math.ceil(self.duration_s / self.chunk_s - 1e-9))
        self.propagator = Propagator(constellation, epoch, warn)
        self._cache: OrderedDict[int, SkyChunk] = OrderedDict()   # least recently used first
        self._keep = keep
        self.propagated_samples = 0

    def bounds(self, c: int) -> tuple[float, float]:
        t0 = c * self.chunk_s
        return t0, min(self.duration_s, t0 + self.chunk_s)

    def chunk_index(self, t_s: float) -> int:
        return int(min(self.n_chunks - 1, max(0, math.floor(t_s / self.chunk_s))))

    def chunk(self, c: int) -> SkyChunk:
        if c in self._cache:
            self._cache.move_to_end(c)
            return self._cache[c]
        t0, t1 = self.bounds(c)
        grid = chunk_grid(t0, t1, self.step_s)
        r, v, valid = self.propagator.propagate(grid)
        self.propagated_samples += r.shape[0] * r.shape[1]
        out = SkyChunk(c, t0, t1, grid, r, v, gravity_acceleration(r), valid)
        self._cache[c] = out
        while len(self._cache) > self._keep:
            self._cache.popitem(last=False)
        return out

    def _by_chunk(self, t_s: np.ndarray):
        """(chunk, mask) for the chunks the instants fall in; the mask is None when they all
        fall in one (the common case: the caller then skips masked copies)."""
        cidx = np.minimum(self.n_chunks - 1, np.maximum(0, np.floor(t_s / self.chunk_s))).astype(int)
        if cidx.size and cidx.min() == cidx.max():     # the common case: one chunk, no mask
            yield self.chunk(int(cidx.flat[0])), None
            return
        for c in np.unique(cidx):
            yield self.chunk(int(c)), cidx == c

    def positions_on_grid(self, sat: np.ndarray, t_s: np.ndarray, step_s: float) -> np.ndarray:
        """Positions at grid instants k * step_s, spanning chunks (see SkyChunk)."""
        return self._spanning(sat, t_s, lambda c, s, t: c.positions_on_grid(s, t, step_s))

    def velocities_on_grid(self, sat: np.ndarray, t_s: np.ndarray, step_s: float) -> np.ndarray:
        """Velocities at grid instants k * step_s, spanning chunks (see SkyChunk)."""
        return self._spanning(sat, t_s, lambda c, s, t: c.velocities_on_grid(s, t, step_s))

    def _spanning(self, sat, t_s, fn) -> np.ndarray:
        sat, t_s = np.broadcast_arrays(np.asarray(sat), np.asarray(t_s, dtype=float))
        out = np.empty(t_s.shape + (3,))
        for chunk, m in self._by_chunk(t_s):
            if m is None:
                return fn(chunk, sat, t_s)
            out[m] = fn(chunk, sat[m], t_s[m])
        return out

    def states(self, sat: np.ndarray, t_s: np.ndarray, *, velocity: bool = True
               ) -> tuple[np.ndarray, np.ndarray | None]:
        """States at arbitrary times, spanning chunks as needed (times in [0, duration])."""
        sat, t_s = np.broadcast_arrays(np.asarray(sat), np.asarray(t_s, dtype=float))
        pos = np.empty(t_s.shape + (3,))
        vel = np.empty(t_s.shape + (3,)) if velocity else None
        for chunk, m in self._by_chunk(t_s):
            if m is None:
                return chunk.states(sat, t_s, velocity=velocity)
            p, q = chunk.states(sat[m], t_s[m], velocity=velocity)
            pos[m] = p
            if velocity:
                vel[m] = q
        return pos, vel

    def close(self) -> None:
        self.propagator.close()
