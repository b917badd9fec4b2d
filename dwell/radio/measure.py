"""What a terminal measures at each measurement instant: the cells in view and their link.

:class:`MeasurementStream` builds, block by block, the :class:`~dwell.policies.base.Rows` every
kernel and policy reads: for each instant ``t_k = k * period`` and each satellite window in view,
geometry (Hermite-interpolated, never a propagator call); the cells of that satellite around the
terminal (:mod:`dwell.radio.cells`: its single beam, the earth-moving beams near the terminal's
direction, or the earth-fixed cells it serves); each cell's link budget, SINR against the
co-channel cells of every satellite in view (:mod:`dwell.radio.interference`), optional
correlated log-normal shadowing (a property of the path to the satellite, shared by its beams),
measurement noise (per cell), and the layer-3 filter (TS 38.331 section 5.5.3.2, with the
coefficient adapted to the simulated period as in :func:`dwell.radio.link.l3_alpha`).

Columns hold *cell runs*: the rows over which one cell of one satellite window is measured
without a break.  They are laid out by interval colouring (a column is reused once its run
ends), so the matrix stays as narrow as the most cells measured at once.  The layer-3 filter
runs along each cell run.

Blocks are built in time order (filter and shadowing states carry from one block to the next)
and dropped once every reader has moved past them, so memory stays bounded for any duration.
Cost per block: one vectorised pass over its (instant, satellite-in-view) pairs and their
cells, plus a Python step per cell run for the column layout.
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
_MEASURE_BEAM = noise.stream_id("measurement-beams")
_MEASURE_GROUND = noise.stream_id("measurement-ground-cells")
_NLOS = noise.stream_id("nlos-rows")
FIELDS = ("sat", "win", "cell", "beam", "rsrp_dbm", "rsrp_raw_dbm", "snr_db", "sinr_db",
          "elevation_deg", "azimuth_deg", "range_km", "nadir_km", "ref_km", "ref0_km", "start_s",
          "end_s", "cell_end_s", "pass_end_s", "range_rate_km_s")
INT_FIELDS = ("sat", "win", "cell", "beam")


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


class _RunLedger:
    """Ids and columns of cell runs, carried across blocks (greedy interval colouring)."""

    def __init__(self):
        self.open: dict[tuple[int, int], tuple[int, int]] = {}   # (window, cell) -> (id, column)
        self.busy: list[tuple[int, int]] = []                    # (first free row, column) heap
        self.free: list[int] = []
        self.next_id = 0
        self.n_cols = 0

    def assign(self, win: np.ndarray, cell: np.ndarray, first_k: np.ndarray, last_k: np.ndarray,
               k_a: int, k_b: int) -> tuple[np.ndarray, np.ndarray]:
        """Run ids and columns of this block's runs (each given by its window, cell and first
        and last row); a run starting at the block's first row continues an open run of the
        same window and cell."""
        import heapq

        n = win.size
        ids = np.empty(n, dtype=np.int64)
        cols = np.empty(n, dtype=np.int64)
        keys = list(zip(win.tolist(), cell.tolist()))
        cont = [first_k[i] == k_a and keys[i] in self.open for i in range(n)]
        kept = {keys[i] for i in range(n) if cont[i]}
        for key, (_, col) in self.open.items():        # open runs that stopped at the edge
            if key not in kept:
                heapq.heappush(self.busy, (k_a, col))
        new_open: dict[tuple[int, int], tuple[int, int]] = {}
        for i in np.argsort(first_k, kind="stable").tolist():
            if cont[i]:
                rid, col = self.open[keys[i]]
            else:
                f = int(first_k[i])
                while self.busy and self.busy[0][0] <= f:
                    heapq.heappush(self.free, heapq.heappop(self.busy)[1])
                if self.free:
                    col = heapq.heappop(self.free)
                else:
                    col = self.n_cols
                    self.n_cols += 1
                rid = self.next_id
                self.next_id += 1
            ids[i], cols[i] = rid, col
            if last_k[i] == k_b - 1:
                new_open[keys[i]] = (rid, col)
            else:
                heapq.heappush(self.busy, (int(last_k[i]) + 1, col))
        self.open = new_open
        return ids, cols


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
        scen = geo.scen
        self.layouts = list(scen.layouts) or [None]
        self.sat_table = np.array([s.table for s in scen.constellation.satellites], dtype=np.int64)
        self.interference = bool(self.lp.get("interference"))
        self.ground = getattr(geo, "ground_cells", None)
        self.buf: dict[str, np.ndarray] = {}
        self.buf_t = np.zeros(0)
        self.buf_k0 = 0                   # row index of the buffer's first row
        self._width = 1                   # columns in use (the buffer may be wider)
        self.built_rows = 0
        self.built = -1
        self.pin = 0                      # rows below this may be dropped
        self._readers: dict[int, int] = {}
        self._carry_filter: dict[int, float] = {}
        self._carry_l1: dict[int, tuple[int, float, float]] = {}   # run -> (j, filter, raw)
        self._carry_ref0: dict[int, float] = {}                     # run -> first ref distance
        self._carry_shadow: dict[int, float] = {}
        self._carry_nlos: dict[int, float] = {}
        self._runs = _RunLedger()
        self.samples = 0
        self.uncovered: list[tuple[float, float]] = []   # satellites in view, no cell measured

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
                    range_rate_km_s=v["range_rate_km_s"], cell=v["cell"], beam=v["beam"],
                    sinr_db=v["sinr_db"], rsrp_raw_dbm=v["rsrp_raw_dbm"], ref_km=v["ref_km"],
                    cell_end_s=v["cell_end_s"], pass_end_s=v["pass_end_s"], ref0_km=v["ref0_km"])

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
            # never more rows than remain to the scenario's end (a reader that keeps every
            # row would otherwise get a buffer twice the run, every page of it touched)
            new_cap = min(max(2 * (live + nb), 4 * self.B), self.K - (self.buf_k0 + keep))
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
        sat, start, end, wid, pid = [], [], [], [], []
        for c in range(c_a, c_b + 1):
            sw = geo.tables[self.k_site][c]
            w = sw.windows
            m = (w.end_s > t_a) & (w.start_s <= t_b)
            sat.append(w.sat[m])
            start.append(w.start_s[m])
            end.append(w.end_s[m])
            wid.append(sw.wid[m])
            pid.append(sw.pass_gid[m])
        cat = [np.concatenate(x) for x in (sat, start, end, wid, pid)]
        geo.ensure_closed(self.k_site, np.unique(cat[3]))
        geo.ensure_passes_closed(self.k_site, np.unique(cat[4]))
        return cat[:4]

    def _build(self, b: int) -> None:
        k_a = b * self.B
        k_b = min(self.K, k_a + self.B)
        nb = k_b - k_a
        dt = self.period_s
        t_a, t_b = k_a * dt, (k_b - 1) * dt
        if self.ground is not None:
            self.ground.build_schedules(self.geo, len(self.geo.sites))
        sat, start, end, wid = self._pieces(t_a, t_b)
        # rows of each piece inside this block: start <= t_k < end
        r0 = np.maximum(first_row_at_or_after(start, dt), k_a)
        r1 = np.maximum(np.minimum(first_row_at_or_after(end, dt), k_b), r0)   # exclusive
        piece = np.repeat(np.arange(sat.size), r1 - r0)
        k = _ranges(r0, r1)
        # pairs ordered window by window, then time: one contiguous segment per window
        order = _lexsort((k, wid[piece]))
        if order is not None:
            piece, k = piece[order], k[order]
        blk = None
        if k.size:
            cells, vals = self._measure(sat[piece], wid[piece], k, k_a, nb)
            blk = self._lay_out(cells, vals, k_a, k_b)
            covered = np.zeros(nb, bool)
            covered[vals["row"]] = True
            seen = np.zeros(nb, bool)
            seen[k - k_a] = True
            self._note_uncovered(np.flatnonzero(seen & ~covered) + k_a)
        if blk is None:
            blk = {f: np.full((nb, 1), -1 if f in INT_FIELDS else np.nan,
                              dtype=np.int64 if f in INT_FIELDS else float) for f in FIELDS}
        self._append(blk, k_a, k_b)
        self.built = b
        ended = self.geo.index[self.k_site].end_s
        for store in (self._carry_shadow, self._carry_nlos):
            for w in [w for w in store if ended[w] <= k_b * dt]:
                del store[w]
        live = {rid for rid, _ in self._runs.open.values()}
        for store in (self._carry_filter, self._carry_l1, self._carry_ref0):
            for rid in [r for r in store if r not in live]:
                del store[rid]

    def _note_uncovered(self, rows_k: np.ndarray) -> None:
        """Instants with a satellite in view but no cell measured, as [t_k, t_k + dt) runs."""
        if rows_k.size == 0:
            return
        brk = np.flatnonzero(np.diff(rows_k) > 1)
        first = np.concatenate([[0], brk + 1])
        last = np.concatenate([brk, [rows_k.size - 1]])
        dt = self.period_s
        for a, b in zip(rows_k[first].tolist(), rows_k[last].tolist()):
            s, e = a * dt, min((b + 1) * dt, self.geo.duration_s)
            if self.uncovered and abs(self.uncovered[-1][1] - s) < 1e-9:
                self.uncovered[-1] = (self.uncovered[-1][0], e)
            else:
                self.uncovered.append((s, e))

    def _measure(self, sat: np.ndarray, win: np.ndarray, k: np.ndarray, k_a: int, nb: int):
        """Geometry of (satellite, window, row) pairs sorted by window, row; their cells; the
        cells' budgets, SINR, noise and filter.  Returns the measured cells (sorted by cell
        run, row) and their values."""
        from . import cells as cellmod
        from . import interference

        geo = self.geo
        t = k * self.period_s
        r_sat = geo.sky.positions_on_grid(sat, t, self.period_s)
        k0 = int(k.min())
        k_hi = int(k.max())
        pos_rows, _, basis_rows = self.site.teme(np.arange(k0, k_hi + 1) * self.period_s, geo.earth)
        pos, basis = pos_rows[k - k0], basis_rows[k - k0]
        lk = look(r_sat, None, pos, None, basis)
        off = linkmod.off_boresight_deg(r_sat, pos)
        cosg = np.einsum("ij,ij->i", r_sat, pos) / (np.linalg.norm(r_sat, axis=1) *
                                                     np.linalg.norm(pos, axis=1))
        nadir_km = np.arccos(np.clip(cosg, -1.0, 1.0)) * MEAN_EARTH_RADIUS_KM
        seg_start = np.ones(win.size, bool)
        seg_start[1:] = win[1:] != win[:-1]
        seg_w = win[seg_start]
        key = self.site.index * 1_000_003 + sat   # the terminal's scenario index: splits of
        # a run across workers must not change its draws
        # path effects of each pair (shared by all beams of the satellite)
        std = float(self.lp["shadowing_std_db"])
        shadow = None
        if std > 0:
            z = noise.normal(self.seed, _SHADOW, key, k)
            x, last = linkmod.ar1_blocks(z, seg_start, self.rho_shadow,
                                         self._carried(self._carry_shadow, seg_w))
            self._store(self._carry_shadow, seg_w, last)
            shadow = std * x
        nlos = None
        if self.nlos_db is not None:
            z = noise.normal(self.site.los.seed, _NLOS, key, k)
            x, last = linkmod.ar1_blocks(z, seg_start, self.rho_nlos,
                                         self._carried(self._carry_nlos, seg_w))
            self._store(self._carry_nlos, seg_w, last)
            nlos = np.where(~los_mod.is_los(self.site.los.environment, lk["elevation_deg"], x),
                            self.nlos_db, 0.0)
        # the cells of each pair, per constellation table
        f_ghz = self.model.frequency_ghz
        table = self.sat_table[sat]
        parts = []
        v_sat = None
        for ti, lay in enumerate(self.layouts):
            own = np.flatnonzero(table == ti) if len(self.layouts) > 1 else np.arange(sat.size)
            if own.size == 0:
                continue
            if lay is None or lay.single:
                from .beams import BeamLayout
                lay = lay or BeamLayout("single", 0, 1.0, float(self.lp["sat_aperture_m"]),
                                        float(self.lp["sat_max_gain_dbi"]), 1, 1.0,
                                        "earth-moving", None, 0.0, None, None)
                parts.append(cellmod.expand_single(own, sat[own], off[own], nadir_km[own], lay,
                                                   f_ghz, self.lp["sat_beam_pointing"]))
            elif not lay.earth_fixed:
                if v_sat is None:
                    v_sat = geo.sky.velocities_on_grid(sat, t, self.period_s)
                parts.append(cellmod.expand_moving(own, sat[own], r_sat[own], v_sat[own],
                                                   pos[own], lay, f_ghz))
            else:
                parts.append(self._ground(own, sat, k, t, r_sat, pos, k0, k_hi, ti))
        cs = cellmod.CellSamples.concat(parts)
        bud = self.model.budget(lk["range_km"][cs.pair], lk["elevation_deg"][cs.pair], None,
                                gain_dbi=cs.gain_dbi, max_gain_dbi=cs.max_gain_dbi)
        rsrp = bud["rsrp_dbm"].copy()
        snr = bud["snr_db"].copy()
        if shadow is not None:
            rsrp += shadow[cs.pair]
            snr += shadow[cs.pair]
        if nlos is not None:
            rsrp -= nlos[cs.pair]
            snr -= nlos[cs.pair]
        row = k[cs.pair] - k_a
        sinr = interference.sinr_db(snr, row, cs.colour, cs.load, nb, self.interference)
        # measured cells only (and detectable: SINR at or above the detection threshold, when
        # one is set), ordered by cell run (window, cell), then row
        detect = self.lp.get("detection_sinr_db")
        m = np.flatnonzero(cs.measured & (sinr >= detect) if detect is not None else cs.measured)
        by_run = _lexsort((k[cs.pair[m]], cs.cell[m], win[cs.pair[m]]))
        order = m if by_run is None else m[by_run]
        pr = cs.pair[order]
        cell, beam = cs.cell[order], cs.beam[order]
        kk = k[pr]
        new_run = np.ones(order.size, bool)
        new_run[1:] = (win[pr][1:] != win[pr][:-1]) | (cell[1:] != cell[:-1]) | (kk[1:] != kk[:-1] + 1)
        # measurement-noise draws: beam 0 keeps the single-beam key (terminal and satellite);
        # other beams and ground cells draw on their own streams with the cell in the key
        ground = cellmod.is_ground(cell)
        stream = np.where(ground, _MEASURE_GROUND, np.where(beam > 0, _MEASURE_BEAM, _MEASURE))
        mkey = np.where(ground, key[pr] * 7919 + (cell - cellmod.GROUND_BASE),
                        np.where(beam > 0, key[pr] * cellmod.BEAM_STRIDE + beam, key[pr]))
        runs = {"win": win[pr][new_run], "cell": cell[new_run], "first": kk[new_run],
                "last": np.append(kk[np.flatnonzero(new_run)[1:] - 1], kk[-1:]) if kk.size
                else kk}
        runs["stream"], runs["key"] = stream[new_run], mkey[new_run]
        self.samples += order.size
        return (runs, new_run), {
            "pair_sat": sat[pr], "pair_win": win[pr], "row": kk - k_a, "k": kk, "cell": cell,
            "beam": beam, "true": rsrp[order], "snr_db": snr[order], "sinr_db": sinr[order],
            "elevation_deg": lk["elevation_deg"][pr], "azimuth_deg": lk["azimuth_deg"][pr],
            "range_km": lk["range_km"][pr], "nadir_km": nadir_km[pr], "ref_km": cs.ref_km[order],
            "until_s": cs.until_s[order],
            "range_rate_km_s": self._range_rate(lk["range_km"], seg_start)[pr]}

    def _ground(self, own, sat, k, t, r_sat, pos, k0, k_hi, ti):
        """Earth-fixed cells of table ``ti`` for the pairs ``own``."""
        from . import cells as cellmod

        rows_t = np.arange(k0, k_hi + 1) * self.period_s
        lat, lon, _ = self.site.motion.geodetic(rows_t)
        near = {ti: self.ground.near(ti, lat, lon)}
        gmst = self.geo.earth.gmst(t[own])
        return cellmod.expand_ground(own, sat[own], k[own] - k0, t[own], r_sat[own], pos[own],
                                     near, self.ground, gmst, self.model.frequency_ghz, lat, lon)

    def _lay_out(self, cells, vals, k_a: int, k_b: int) -> dict[str, np.ndarray] | None:
        """Filter along cell runs, give runs ids and columns, fill the block matrix."""
        runs, new_run = cells
        if vals["k"].size == 0:
            return None
        ids, cols = self._runs.assign(runs["win"], runs["cell"], runs["first"], runs["last"],
                                      k_a, k_b)
        run_of = np.cumsum(new_run) - 1
        # the signal's own filtering, at the row rate with the period-adapted weight; a run
        # continuing from the previous block carries its filter state in (same run id)
        filt, last = linkmod.l3_filter_blocks(vals["true"], new_run, self.alpha,
                                              self._carried(self._carry_filter, ids))
        self._store(self._carry_filter, ids, last)
        raw = vals["true"]
        if float(self.lp["measurement_noise_db"]) > 0:
            noise_f, noise_raw = self._l1_noise(runs, new_run, ids, run_of, vals["k"])
            filt = filt + noise_f
            raw = raw + noise_raw
        nb = k_b - k_a
        width = int(cols.max()) + 1
        blk = {f: np.full((nb, width), -1 if f in INT_FIELDS else np.nan,
                          dtype=np.int64 if f in INT_FIELDS else float) for f in FIELDS}
        flat = vals["row"] * width + cols[run_of]    # flat positions: one index for all fields

        def put(f: str, v: np.ndarray) -> None:
            blk[f].reshape(-1)[flat] = v             # a view: the arrays are fresh, contiguous

        idx = self.geo.index[self.k_site]
        put("sat", vals["pair_sat"])
        put("win", ids[run_of])
        put("cell", vals["cell"])
        put("beam", vals["beam"])
        put("start_s", idx.start_s[vals["pair_win"]])
        end_s = idx.end_s[vals["pair_win"]]
        put("end_s", end_s)
        # a cell's service ends with its satellite's window, or earlier at a cell switch
        put("cell_end_s", np.fmin(end_s, vals["until_s"]))
        # the floor pass's end: when ephemeris says the satellite leaves (no obstruction)
        passes = idx.pass_id[vals["pair_win"]]
        put("pass_end_s", self.geo.pass_index[self.k_site].end_s[passes]
            if passes.size else np.zeros(0))
        put("rsrp_dbm", filt)
        put("rsrp_raw_dbm", raw)
        for f in ("snr_db", "sinr_db", "elevation_deg", "azimuth_deg", "range_km", "nadir_km",
                  "ref_km", "range_rate_km_s"):
            put(f, vals[f])
        # the reference location's distance when the cell was first measured (a reference
        # location fixed at configuration, as Rel-17 event D1 has it)
        first = np.flatnonzero(new_run)
        ref0 = vals["ref_km"][first].copy()
        for i, rid in enumerate(ids.tolist()):
            ref0[i] = self._carry_ref0.setdefault(rid, float(ref0[i]))
        put("ref0_km", ref0[run_of])
        return blk

    def _l1_noise(self, runs, new_run, ids, run_of, k) -> tuple[np.ndarray, np.ndarray]:
        """Measurement noise of each measured sample: filtered (into the RSRP the policies read)
        and raw (the latest layer-1 measurement).

        Layer-1 measurements come every ``l1_period_s`` on a grid of their own (index
        ``j = floor(t / l1_period_s)``), each with an error of ``measurement_noise_db``; the
        layer-3 filter (TS 38.331 section 5.5.3.2) runs at that rate with weight
        ``1 / 2^(k/4)``, and a row reads the filter after the latest layer-1 measurement at or
        before it.  So the filtered noise is the same process whatever ``measurement_period_s``
        is (the signal's own slow variation is filtered at the row rate).  Draws are keyed by
        the cell and j, never by the row."""
        from . import cells as cellmod  # noqa: F401  (keys come precomputed with the runs)

        l1 = float(self.lp["l1_period_s"])
        a = 1.0 / 2.0 ** (int(self.lp["l3_filter_k"]) / 4.0)
        std = float(self.lp["measurement_noise_db"])
        j_of = np.floor(k * self.period_s / l1 + 1e-9).astype(np.int64)
        n_runs = ids.size
        first = np.flatnonzero(new_run)
        last = np.append(first[1:] - 1, k.size - 1)
        carry_j = np.full(n_runs, -1, dtype=np.int64)
        carry_f = np.full(n_runs, np.nan)
        carry_e = np.full(n_runs, np.nan)
        for i, rid in enumerate(ids.tolist()):
            c = self._carry_l1.get(rid)
            if c is not None:
                carry_j[i], carry_f[i], carry_e[i] = c
        cont = carry_j >= 0
        j_start = np.where(cont, carry_j + 1, j_of[first])
        j_end = np.maximum(j_of[last], j_start - 1)                  # empty when no new sample
        counts = j_end - j_start + 1
        seq_j = _ranges(j_start, j_end + 1)
        seq_run = np.repeat(np.arange(n_runs), counts)
        e = std * _normal_streams(self.seed, runs["stream"][seq_run], runs["key"][seq_run], seq_j)
        seg = np.zeros(seq_j.size, bool)
        base = np.cumsum(counts) - counts
        seg[base[counts > 0]] = True
        has = counts > 0
        f_seq, f_last = linkmod.l3_filter_blocks(e, seg, a, carry_f[has]) if e.size else \
            (e, np.zeros(0))
        # each sample reads the filter after its latest layer-1 measurement
        idx = base[run_of] + (j_of - j_start[run_of])
        fresh = j_of >= j_start[run_of]
        safe = np.clip(idx, 0, max(e.size - 1, 0))
        noise_f = np.where(fresh, f_seq[safe] if e.size else 0.0, carry_f[run_of])
        noise_raw = np.where(fresh, e[safe] if e.size else 0.0, carry_e[run_of])
        end_f = carry_f.copy()
        end_e = carry_e.copy()
        end_f[has] = f_last
        end_e[has] = e[base[has] + counts[has] - 1]
        for i, rid in enumerate(ids.tolist()):
            self._carry_l1[rid] = (int(j_end[i]) if counts[i] > 0 else int(carry_j[i]),
                                   float(end_f[i]), float(end_e[i]))
        return noise_f, noise_raw

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


def _lexsort(keys: tuple[np.ndarray, ...]) -> np.ndarray | None:
    """``np.lexsort(keys)`` (last key primary), or None when the rows are in that order
    already (single-beam pairs come sorted): the check is a few passes, the sort a log more.
    Rows with all keys equal keep their order, as the stable lexsort keeps them."""
    if keys[0].size < 2:
        return None
    undecided = None                # consecutive rows equal on the keys seen so far
    for key in keys[::-1]:
        d = np.diff(key)
        if (d < 0 if undecided is None else undecided & (d < 0)).any():
            return np.lexsort(keys)
        undecided = d == 0 if undecided is None else undecided & (d == 0)
    return None


def _normal_streams(seed: int, stream: np.ndarray, key: np.ndarray, index: np.ndarray
                    ) -> np.ndarray:
    """Standard normal draws whose stream varies per sample (one call per distinct stream)."""
    if stream.size and stream.min() == stream.max():     # one stream (single-beam runs)
        return noise.normal(seed, int(stream[0]), key, index)
    out = np.empty(index.shape)
    for s in np.unique(stream).tolist():
        m = stream == s
        out[m] = noise.normal(seed, int(s), key[m], index[m])
    return out
