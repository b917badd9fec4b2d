"""What a terminal measures at each measurement instant: the satellites in view and their link.

:class:`MeasurementStream` builds, block by block, the :class:`~dwell.policies.base.Rows` every
kernel and policy reads: for each instant ``t_k = k * period`` and each satellite window in view,
geometry (Hermite-interpolated, never a propagator call), the link budget, optional correlated
log-normal shadowing, measurement noise, and the layer-3 filter (TS 38.331 section 5.5.3.2, with
the coefficient adapted to the simulated period as in :func:`dwell.radio.link.l3_alpha`).

Blocks are built in time order (filter and shadowing states carry from one block to the next)
and dropped once every reader has moved past them, so memory stays bounded for any duration.
Cost per block: one vectorised pass over its (instant, satellite-in-view) pairs.
"""

from __future__ import annotations

import math

import numpy as np

from ..obstruction import los as los_mod
from ..orbits.frames import MEAN_EARTH_RADIUS_KM
from ..orbits.geometry import Geometry
from ..orbits.look import look
from ..orbits.passes import _ranges
from ..policies.base import Rows
from . import link as linkmod
from . import noise

_SHADOW = noise.stream_id("shadowing")
_MEASURE = noise.stream_id("measurement")
_NLOS = noise.stream_id("nlos-rows")
FIELDS = ("sat", "win", "rsrp_dbm", "snr_db", "elevation_deg", "azimuth_deg", "range_km",
          "nadir_km", "start_s", "end_s", "range_rate_km_s")


def row_count(duration_s: float, period_s: float) -> int:
    """Measurement instants k * period with k * period < duration."""
    return max(1, math.ceil(duration_s / period_s - 1e-9))


def first_row_at_or_after(t_s: np.ndarray, period_s: float) -> np.ndarray:
    """Smallest k with k * period >= t, exactly as the float comparison says."""
    k = np.ceil(np.asarray(t_s) / period_s).astype(np.int64)
    k = np.where((k - 1) * period_s >= t_s, k - 1, k)
    return np.where(k * period_s < t_s, k + 1, k)


def row_at_or_after(t_s: float, period_s: float) -> int:
    """Scalar :func:`first_row_at_or_after`."""
    k = math.ceil(t_s / period_s)
    if (k - 1) * period_s >= t_s:
        k -= 1
    if k * period_s < t_s:
        k += 1
    return k


class MeasurementStream:
    """Measurement rows of one terminal, built lazily in blocks."""

    def __init__(self, geo: Geometry, site_index: int, link_params: dict, period_s: float,
                 seed: int, block_rows: int | None = None):
        self.geo = geo
        self.k_site = site_index
        self.site = geo.sites[site_index]
        self.model = linkmod.LinkModel(link_params)
        self.lp = self.model.params
        self.period_s = float(period_s)
        self.seed = int(seed)
        self.K = row_count(geo.duration_s, self.period_s)
        self.B = int(block_rows or max(64, math.ceil(900.0 / self.period_s)))
        self.alpha = linkmod.l3_alpha(int(self.lp["l3_filter_k"]), self.period_s,
                                      float(self.lp["l1_period_s"]))
        self.rho_shadow = self.model.shadowing_rho(self.period_s)
        los = self.site.los
        self.nlos_db = None if los is None or los.blocks else float(los.nlos_loss_db)
        self.rho_nlos = (los_mod.lag_correlation(self.period_s, los.decorrelation_s)
                         if self.nlos_db is not None else 0.0)
        self.buf: dict[str, np.ndarray] = {}
        self.buf_t = np.zeros(0)
        self.buf_k0 = 0                   # row index of the buffer's first row
        self._width = 1                   # columns in use (the buffer may be wider)
        self.built_rows = 0
        self.built = -1
        self.pin = 0                      # rows below this may be dropped
        self._readers: dict[int, int] = {}
        self._carry_filter: dict[int, float] = {}
        self._carry_shadow: dict[int, float] = {}
        self._carry_nlos: dict[int, float] = {}
        self.samples = 0

    # ---- public ------------------------------------------------------------------------------
    def time_of(self, k: int) -> float:
        return k * self.period_s

    def rows(self, k_a: int, k_b: int) -> Rows:
        """Rows k_a .. k_b-1 (clipped to the scenario), as views of the stream's buffer."""
        k_a = max(0, k_a)
        k_b = min(self.K, max(k_b, k_a + 1))
        while self.built_rows < k_b:
            self._build(self.built + 1)
        if k_a < self.buf_k0:
            raise RuntimeError(f"measurement rows from {k_a} were dropped before they were read")
        lo, hi = k_a - self.buf_k0, k_b - self.buf_k0
        w = self._width
        v = {f: self.buf[f][lo:hi, :w] for f in FIELDS}
        final = k_b >= self.K
        t = self.buf_t[lo:hi]
        return Rows(k_a, t, v["sat"], v["win"], v["rsrp_dbm"], v["snr_db"], v["elevation_deg"],
                    v["azimuth_deg"], v["range_km"], v["nadir_km"], v["start_s"], v["end_s"],
                    certain_until_s=math.inf if final else float(t[-1]), final=final,
                    range_rate_km_s=v["range_rate_km_s"])

    def release(self, k: int, reader: object = None) -> None:
        """``reader`` no longer needs rows before k; rows every reader has passed may go."""
        if reader is not None:
            self._readers[id(reader)] = k
        self.pin = min(self._readers.values()) if self._readers else max(self.pin, k)

    def _append(self, blk: dict[str, np.ndarray], k_a: int, k_b: int) -> None:
        """Add a block after the buffered rows.  The buffer has spare capacity (doubling), so
        appends are amortised O(block); when full it is reallocated, keeping rows from the pin
        on.  Data is never moved inside an array a caller may hold a view of."""
        nb = k_b - k_a
        width = blk["sat"].shape[1]
        used = self.built_rows - self.buf_k0
        cap = self.buf["sat"].shape[0] if self.buf else 0
        have_w = self.buf["sat"].shape[1] if self.buf else 0
        if not self.buf or used + nb > cap or width > have_w:
            keep = max(0, min(self.pin, k_a) - self.buf_k0) if self.buf else 0
            live = used - keep
            new_cap = max(2 * (live + nb), 4 * self.B)
            new_w = max(width, have_w)
            new = {}
            for f in FIELDS:
                fill = -1 if blk[f].dtype.kind == "i" else np.nan
                arr = np.full((new_cap, new_w), fill, dtype=blk[f].dtype)
                if self.buf and live:
                    arr[:live, :have_w] = self.buf[f][keep:used]
                new[f] = arr
            t = np.zeros(new_cap)
            if self.buf and live:
                t[:live] = self.buf_t[keep:used]
            self.buf, self.buf_t = new, t
            self.buf_k0 += keep
            used = live
        for f in FIELDS:
            self.buf[f][used:used + nb, :width] = blk[f]
        self.buf_t[used:used + nb] = np.arange(k_a, k_b) * self.period_s
        self.built_rows = k_b
        self._width = max(self._width, width)

    def window_end_covering(self, sat: int, t_s: float) -> float | None:
        """End of ``sat``'s visibility window open at ``t_s``, or None if it is not in view."""
        k = row_at_or_after(t_s, self.period_s)
        if k < self.K:
            row = self.rows(k, k + 1)
            hit = np.flatnonzero(row.sat[0] == sat)
            if hit.size and row.start_s[0, hit[0]] <= t_s:
                return float(row.end_s[0, hit[0]])   # the window open at row k covers t_s too
        geo = self.geo
        geo.chunk_windows(geo.sky.chunk_index(t_s))
        idx = geo.index[self.k_site]
        hit = np.flatnonzero((idx.sat == sat) & (idx.start_s <= t_s) & (idx.end_s > t_s))
        if hit.size == 0:
            return None
        geo.ensure_closed(self.k_site, hit)
        return float(idx.end_s[hit[0]])

    # ---- building ----------------------------------------------------------------------------
    def _pieces(self, t_a: float, t_b: float):
        geo = self.geo
        c_a = geo.sky.chunk_index(t_a)
        c_b = geo.sky.chunk_index(t_b)
        geo.chunk_windows(c_b)
        sat, start, end, wid, slot = [], [], [], [], []
        for c in range(c_a, c_b + 1):
            sw = geo.tables[self.k_site][c]
            w = sw.windows
            m = (w.end_s > t_a) & (w.start_s <= t_b)
            sat.append(w.sat[m])
            start.append(w.start_s[m])
            end.append(w.end_s[m])
            wid.append(sw.wid[m])
            slot.append(sw.slot[m])
        cat = [np.concatenate(x) for x in (sat, start, end, wid, slot)]
        geo.ensure_closed(self.k_site, np.unique(cat[3]))
        return cat

    def _build(self, b: int) -> None:
        k_a = b * self.B
        k_b = min(self.K, k_a + self.B)
        dt = self.period_s
        t_a, t_b = k_a * dt, (k_b - 1) * dt
        sat, start, end, wid, slot = self._pieces(t_a, t_b)
        # rows of each piece inside this block: start <= t_k < end
        r0 = np.maximum(first_row_at_or_after(start, dt), k_a)
        r1 = np.maximum(np.minimum(first_row_at_or_after(end, dt), k_b), r0)   # exclusive
        n = r1 - r0
        piece = np.repeat(np.arange(sat.size), n)
        k = _ranges(r0, r1)
        # pairs ordered window by window, then time: one contiguous segment per window
        order = np.lexsort((k, wid[piece]))
        piece, k = piece[order], k[order]
        w_of = wid[piece]
        width = int(slot.max()) + 1 if slot.size else 1
        blk = {f: np.full((k_b - k_a, width), -1 if f in ("sat", "win") else np.nan,
                          dtype=np.int64 if f in ("sat", "win") else float) for f in FIELDS}
        self.samples += k.size
        if k.size:
            vals = self._measure(sat[piece], w_of, k)
            idx = self.geo.index[self.k_site]
            rows = k - k_a
            cols = slot[piece]
            blk["sat"][rows, cols] = sat[piece]
            blk["win"][rows, cols] = w_of
            blk["start_s"][rows, cols] = idx.start_s[w_of]
            blk["end_s"][rows, cols] = idx.end_s[w_of]
            for f, v in vals.items():
                blk[f][rows, cols] = v
        self._append(blk, k_a, k_b)
        self.built = b
        ended = self.geo.index[self.k_site].end_s
        for store in (self._carry_filter, self._carry_shadow, self._carry_nlos):
            for w in [w for w in store if ended[w] <= k_b * dt]:
                del store[w]

    def _measure(self, sat: np.ndarray, win: np.ndarray, k: np.ndarray) -> dict[str, np.ndarray]:
        """Geometry and link values of (satellite, window, row) pairs sorted by window, row."""
        geo = self.geo
        t = k * self.period_s
        r_sat = geo.sky.positions_on_grid(sat, t, self.period_s)
        k0 = int(k.min())
        pos, _, basis = self.site.teme(np.arange(k0, int(k.max()) + 1) * self.period_s, geo.earth)
        pos, basis = pos[k - k0], basis[k - k0]
        lk = look(r_sat, None, pos, None, basis)
        off = linkmod.off_boresight_deg(r_sat, pos)
        cosg = np.einsum("ij,ij->i", r_sat, pos) / (np.linalg.norm(r_sat, axis=1) *
                                                     np.linalg.norm(pos, axis=1))
        nadir_km = np.arccos(np.clip(cosg, -1.0, 1.0)) * MEAN_EARTH_RADIUS_KM
        bud = self.model.budget(lk["range_km"], lk["elevation_deg"], off)
        rsrp = bud["rsrp_dbm"].copy()
        snr = bud["snr_db"].copy()
        seg_start = np.ones(win.size, bool)
        seg_start[1:] = win[1:] != win[:-1]
        seg_w = win[seg_start]
        key = self.site.index * 1_000_003 + sat   # the terminal's scenario index: splits of
        # a run across workers must not change its draws
        std = float(self.lp["shadowing_std_db"])
        if std > 0:
            z = noise.normal(self.seed, _SHADOW, key, k)
            x, last = linkmod.ar1_blocks(z, seg_start, self.rho_shadow,
                                         self._carried(self._carry_shadow, seg_w))
            self._store(self._carry_shadow, seg_w, last)
            rsrp += std * x
            snr += std * x
        if self.nlos_db is not None:
            z = noise.normal(self.site.los.seed, _NLOS, key, k)
            x, last = linkmod.ar1_blocks(z, seg_start, self.rho_nlos,
                                         self._carried(self._carry_nlos, seg_w))
            self._store(self._carry_nlos, seg_w, last)
            nlos = ~los_mod.is_los(self.site.los.environment, lk["elevation_deg"], x)
            rsrp -= np.where(nlos, self.nlos_db, 0.0)
            snr -= np.where(nlos, self.nlos_db, 0.0)
        meas = rsrp
        mstd = float(self.lp["measurement_noise_db"])
        if mstd > 0:
            meas = rsrp + mstd * noise.normal(self.seed, _MEASURE, key, k)
        filt, last = linkmod.l3_filter_blocks(meas, seg_start, self.alpha,
                                              self._carried(self._carry_filter, seg_w))
        self._store(self._carry_filter, seg_w, last)
        return {"rsrp_dbm": filt, "snr_db": snr, "elevation_deg": lk["elevation_deg"],
                "azimuth_deg": lk["azimuth_deg"], "range_km": lk["range_km"],
                "nadir_km": nadir_km, "range_rate_km_s": self._range_rate(lk["range_km"], seg_start)}

    def _range_rate(self, rng: np.ndarray, seg_start: np.ndarray) -> np.ndarray:
        """Range rate by central differences along each window's rows (one-sided at its ends
        in the block): at 1 s rows the error is about the range's second derivative times
        dt^2 / 6, well under 1 m/s in LEO; no extra propagation is needed."""
        out = np.full(rng.size, np.nan)
        if rng.size < 2:
            return out
        same_next = ~np.append(seg_start[1:], True)          # next sample is the same window
        same_prev = ~seg_start
        fwd = np.append(np.diff(rng), np.nan) / self.period_s
        bwd = np.insert(np.diff(rng), 0, np.nan) / self.period_s
        both = same_next & same_prev
        out[both] = 0.5 * (fwd[both] + bwd[both])
        only_f = same_next & ~same_prev
        only_b = same_prev & ~same_next
        out[only_f] = fwd[only_f]
        out[only_b] = bwd[only_b]
        return out

    @staticmethod
    def _carried(store: dict[int, float], seg_w: np.ndarray) -> np.ndarray:
        """Carried state per segment: the window's state from the previous block, else NaN."""
        return np.array([store.get(int(w), np.nan) for w in seg_w])

    @staticmethod
    def _store(store: dict[int, float], seg_w: np.ndarray, last: np.ndarray) -> None:
        # only windows still open matter next block, but storing all is cheap and simple
        store.update(zip(seg_w.tolist(), last.tolist()))
