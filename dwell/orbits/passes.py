"""Visibility windows: when each satellite rises above a terminal's floor (and clears its
obstructions) and when it sets, found without stepping the constellation at fine resolution.

For one sky chunk and one site, :func:`find_windows` returns the floor passes and the visibility
windows inside them (a pass cut by an obstruction becomes several windows), each boundary refined
by vectorised bisection to ``refine_s`` (0.01 s by default).

How, and what it costs:

1. Screening on the SGP4 grid.  The geocentric angle between a satellite and the site changes at
   most at the satellite's angular rate plus the Earth's, so an interval whose endpoint angles
   exceed the visibility cap by more than that motion cannot hold a pass.  Cost: one dot product
   per satellite per grid point.
2. The surviving intervals are sampled every ~20 s through the Hermite interpolant (no SGP4
   call).  Sign changes of elevation minus floor bracket rises and sets; local maxima of the
   samples are refined by golden-section search, which finds grazing passes that lie wholly
   between two samples.
3. Brackets are bisected all at once: about 11 rounds of one vectorised evaluation each.
4. Inside each pass, obstructions (masks, canyons) are sampled on a global ``mask_step_s`` grid
   and their sign changes bisected the same way; statistical line-of-sight states are drawn on
   their own grid (see :mod:`dwell.obstruction.los`) and cut windows at sample resolution.

Fixed sites are searched in groups (:func:`find_windows_many`): steps 2 and 3 and the peak
refinement run once per group on (site, satellite) keys, and every refinement counts its
rounds per bracket, so a site's windows are the same in any group.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..obstruction.motion import Static
from ..obstruction.site import Site
from .frames import EarthOrientation, rotate_z
from .look import elevation_deg
from .sky import SkyChunk

GOLDEN = (math.sqrt(5.0) - 1.0) / 2.0

# why a window starts or ends
CAUSE_FLOOR = 0        # the terminal's elevation floor
CAUSE_OBSTRUCTION = 1  # a mask or a canyon building
CAUSE_LOS = 2          # statistical line-of-sight state
CAUSE_EDGE = 3         # the edge of the computed time span
CAUSE_NAMES = ("horizon", "obstruction", "line-of-sight", "edge")


@dataclass
class PassOptions:
    sub_step_s: float = 30.0
    refine_s: float = 0.01
    screen_margin_deg: float = 0.3   # geodetic vs geocentric up (<= 0.19 deg) and site height


@dataclass
class Windows:
    """Visibility intervals of one site in one chunk (arrays of equal length)."""

    sat: np.ndarray
    start_s: np.ndarray
    end_s: np.ndarray
    start_cause: np.ndarray
    end_cause: np.ndarray
    culm_s: np.ndarray
    culm_el_deg: np.ndarray
    pass_id: np.ndarray          # index into the chunk's floor passes

    @classmethod
    def empty(cls) -> "Windows":
        z = np.zeros(0)
        zi = np.zeros(0, dtype=np.int64)
        return cls(zi, z, z, zi.astype(np.int8), zi.astype(np.int8), z, z, zi)

    def __len__(self) -> int:
        return int(self.sat.size)

    def select(self, mask: np.ndarray) -> "Windows":
        return Windows(*(getattr(self, f)[mask] for f in self.__dataclass_fields__))


class _Evaluator:
    """Elevation (and obstruction margin) of (satellite, time) pairs for one site."""

    def __init__(self, chunk: SkyChunk, site: Site, earth: EarthOrientation):
        self.chunk, self.site, self.earth = chunk, site, earth
        self.evaluations = 0

    def elevation(self, sat: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        r, _ = self.chunk.states(sat, t_s, velocity=False)
        pos, up = self.site.position_up(t_s, self.earth)
        self.evaluations += t_s.size
        return elevation_deg(r, pos, up)

    def mask_margin(self, sat: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        """Elevation minus the obstruction mask at the satellite's azimuth (floor excluded)."""
        step = self.site.sample_step_s
        r = self.chunk.positions_on_grid(sat, t_s, step)
        self.evaluations += t_s.size
        az, el = self.site.azimuth_elevation(r, t_s, self.earth)
        return el - self.site.mask_deg(az, t_s)


class _GroupEvaluator:
    """Elevation of (site, satellite, time) triples for a group of sites searched together.

    A triple is keyed ``site * S + sat`` (S satellites in the chunk), so the vectorised
    searches below see one flat key array and one evaluation serves every site of the group:
    the per-call cost of an evaluation is paid once per group, not once per site.  A group is
    either one site of any motion or several fixed sites (their Earth-fixed position and up
    vector are constants, rotated into TEME per instant exactly as ``Site.position_up`` does).
    """

    def __init__(self, chunk: SkyChunk, sites: list[Site], earth: EarthOrientation):
        self.chunk, self.sites, self.earth = chunk, sites, earth
        self.n_sat = int(chunk.r_km.shape[0])
        self.floor_deg = np.array([s.floor_deg for s in sites], dtype=float)
        self.evaluations = 0
        if len(sites) > 1:
            if not all(is_fixed(s) for s in sites):
                raise ValueError("a group of several sites must hold fixed sites only")
            self._r = np.array([s.motion.ecef(0.0)[0] for s in sites])
            self._up = np.array([s.motion.ecef(0.0)[2][2] for s in sites])

    def split(self, key: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(site, satellite) of each key."""
        site = key // self.n_sat
        return site, key - site * self.n_sat

    def position_up(self, site: np.ndarray | None, t_s: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
        """TEME position and up vector of ``site`` (indices into the group, broadcast against
        ``t_s``; None: every site, shape (sites,) + t_s.shape + (3,))."""
        if len(self.sites) == 1:
            pos, up = self.sites[0].position_up(t_s, self.earth)
            if site is None:
                return pos[None], up[None]
            return pos, up
        g = self.earth.gmst(np.asarray(t_s, dtype=float))
        c, s = np.cos(g), np.sin(g)
        if site is None:
            return (rotate_z(self._r[:, None, :], c[None], s[None]),
                    rotate_z(self._up[:, None, :], c[None], s[None]))
        return (rotate_z(np.take(self._r, site, axis=0), c, s),
                rotate_z(np.take(self._up, site, axis=0), c, s))

    def elevation(self, key: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        site, sat = self.split(key)
        r, _ = self.chunk.states(sat, t_s, velocity=False)
        pos, up = self.position_up(site, t_s)
        self.evaluations += t_s.size
        return elevation_deg(r, pos, up)

    def floor_margin(self, key: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        return self.elevation(key, t_s) - self.floor_deg[key // self.n_sat]

    def sine_elevation(self, key: np.ndarray, t_s: np.ndarray) -> np.ndarray:
        """sin(elevation): smooth through the zenith, where elevation itself has a cusp."""
        return np.sin(np.radians(self.elevation(key, t_s)))


def is_fixed(site: Site) -> bool:
    """Whether the site never moves (its pass search may be grouped with others)."""
    return isinstance(site.motion, Static)


def _rounds(width: np.ndarray, target: float, shrink: float) -> np.ndarray:
    """Rounds that take each bracket of ``width`` to ``target`` when one round multiplies it
    by ``shrink``.  Counted per bracket, so a bracket's result never depends on which other
    brackets share the call (terminals searched in groups give the same windows as alone)."""
    ratio = np.maximum(np.asarray(width, dtype=float), target) / target
    return np.maximum(0, np.ceil(np.log(ratio) / -math.log(shrink) - 1e-12)).astype(np.int64)


def bisect(fn, sat: np.ndarray, lo: np.ndarray, hi: np.ndarray, rising: np.ndarray,
           tol_s: float, secant_below_s: float = 2.0) -> np.ndarray:
    """Vectorised root refinement of sign changes; ``rising`` says f(lo) <= 0 < f(hi), else
    f(lo) > 0 >= f(hi).  Returns each crossing to within ``tol_s / 2``, certified.

    Bisection shrinks brackets to ``secant_below_s``; one secant step then proposes a root,
    which is accepted only if f changes sign across [x - tol/2, x + tol/2] (two evaluations);
    brackets that fail the check go on bisecting.  About 7 evaluations per crossing from a 30 s
    bracket instead of 12 for pure bisection.
    """
    lo, hi = lo.astype(float).copy(), hi.astype(float).copy()
    if lo.size == 0:
        return lo
    sign = np.where(rising, 1.0, -1.0)

    def g(sel, t):
        return sign[sel] * fn(sat[sel], t)

    allsel = np.arange(lo.size)
    flo, fhi = np.zeros(lo.size), np.zeros(lo.size)
    lo_known = np.zeros(lo.size, bool)   # ends moved by bisection carry their values
    hi_known = np.zeros(lo.size, bool)
    rounds = _rounds(hi - lo, secant_below_s, 0.5)
    for r in range(int(rounds.max())):
        act = allsel[rounds > r]
        mid = 0.5 * (lo[act] + hi[act])
        fm = g(act, mid)
        up = fm > 0.0
        hi[act], fhi[act] = np.where(up, mid, hi[act]), np.where(up, fm, fhi[act])
        lo[act], flo[act] = np.where(up, lo[act], mid), np.where(up, flo[act], fm)
        hi_known[act] |= up
        lo_known[act] |= ~up
    if not lo_known.all():
        flo[~lo_known] = g(allsel[~lo_known], lo[~lo_known])
    if not hi_known.all():
        fhi[~hi_known] = g(allsel[~hi_known], hi[~hi_known])
    den = fhi - flo
    x = np.where(den > 0, lo - flo * (hi - lo) / np.where(den > 0, den, 1.0), 0.5 * (lo + hi))
    half = 0.5 * tol_s
    x = np.clip(x, lo + half, hi - half)
    ok = (g(allsel, x - half) <= 0.0) & (g(allsel, x + half) > 0.0)
    ok |= (hi - lo) <= tol_s
    out = np.where((hi - lo) <= tol_s, 0.5 * (lo + hi), x)
    bad = np.flatnonzero(~ok)
    if bad.size:
        lo_b, hi_b = lo[bad], hi[bad]
        rounds_b = _rounds(hi_b - lo_b, tol_s, 0.5)
        for r in range(int(rounds_b.max())):
            act = np.flatnonzero(rounds_b > r)
            mid = 0.5 * (lo_b[act] + hi_b[act])
            up = g(bad[act], mid) > 0.0
            hi_b[act], lo_b[act] = np.where(up, mid, hi_b[act]), np.where(up, lo_b[act], mid)
        out[bad] = 0.5 * (lo_b + hi_b)
    return out


def golden_max(fn, sat: np.ndarray, lo: np.ndarray, hi: np.ndarray, tol_s: float
               ) -> tuple[np.ndarray, np.ndarray]:
    """Vectorised golden-section search for the maximum of fn on [lo, hi]; (t_max, f_max)."""
    a, b = lo.astype(float).copy(), hi.astype(float).copy()
    if a.size == 0:
        return a, a.copy()
    c = b - GOLDEN * (b - a)
    d = a + GOLDEN * (b - a)
    fc, fd = fn(sat, c), fn(sat, d)
    rounds = _rounds(b - a, tol_s, GOLDEN)
    for r in range(int(rounds.max())):
        i = np.flatnonzero(rounds > r)
        left = fc[i] >= fd[i]                  # maximum lies in [a, d]
        bi = np.where(left, d[i], b[i])
        ai = np.where(left, a[i], c[i])
        new_c = bi - GOLDEN * (bi - ai)
        new_d = ai + GOLDEN * (bi - ai)
        # reuse the surviving interior point; evaluate the other one
        probe = np.where(left, new_c, new_d)
        fp = fn(sat[i], probe)
        fd[i], fc[i] = np.where(left, fc[i], fp), np.where(left, fp, fd[i])
        c[i], d[i] = np.where(left, new_c, d[i]), np.where(left, c[i], new_d)
        a[i], b[i] = ai, bi
    t = np.where(fc >= fd, c, d)
    return t, np.maximum(fc, fd)


def parabolic_max(fn, sat: np.ndarray, a: np.ndarray, b: np.ndarray, c: np.ndarray,
                  fa: np.ndarray, fb: np.ndarray, fc: np.ndarray, rounds: int = 4
                  ) -> tuple[np.ndarray, np.ndarray]:
    """Successive parabolic interpolation of a bracketed maximum (a < b < c, f(b) >= f(a),
    f(c)), vectorised: each round fits a parabola through the bracket, evaluates its vertex and
    keeps the best three points.  Converges super-linearly on smooth peaks (elevation); 4
    rounds take a 60 s bracket to well under 0.01 s.  Returns (t_max, f_max)."""
    a, b, c = a.astype(float).copy(), b.astype(float).copy(), c.astype(float).copy()
    fa, fb, fc = fa.astype(float).copy(), fb.astype(float).copy(), fc.astype(float).copy()
    for _ in range(rounds):
        if a.size == 0:
            break
        num = (b - a) ** 2 * (fb - fc) - (b - c) ** 2 * (fb - fa)
        den = (b - a) * (fb - fc) - (b - c) * (fb - fa)
        x = b - 0.5 * num / np.where(den != 0, den, 1.0)
        # stay inside the bracket and away from b (a degenerate step would stall)
        span = c - a
        x = np.where((den == 0) | ~np.isfinite(x), 0.5 * (a + c), x)
        x = np.clip(x, a + 1e-3 * span, c - 1e-3 * span)
        x = np.where(np.abs(x - b) < 1e-6 * span, b + np.where(c - b > b - a, 1, -1) * 1e-3 * span, x)
        fx = fn(sat, x)
        left = x < b
        better = fx > fb
        # new bracket keeps the best point in the middle
        na = np.where(left, np.where(better, a, x), np.where(better, b, a))
        nb = np.where(better, x, b)
        nc = np.where(left, np.where(better, b, c), np.where(better, c, x))
        nfa = np.where(left, np.where(better, fa, fx), np.where(better, fb, fa))
        nfb = np.where(better, fx, fb)
        nfc = np.where(left, np.where(better, fb, fc), np.where(better, fc, fx))
        a, b, c, fa, fb, fc = na, nb, nc, nfa, nfb, nfc
    return b, fb


def _screen(chunk: SkyChunk, site: Site, earth: EarthOrientation, opts: PassOptions,
            max_rate_rad_s: float) -> tuple[np.ndarray, np.ndarray]:
    """Candidate (satellite, interval) pairs that may hold visibility."""
    grid = chunk.grid_s
    pos, _ = site.position_up(grid, earth)                   # (n, 3): teme()'s position
    unit, r_max = chunk.directions()                         # (3, S, n), (S,): shared
    r_site = np.linalg.norm(pos, axis=-1)
    d = pos / r_site[:, None]
    # the dot product term by term, in einsum's order (the same values, on contiguous rows)
    cosg = unit[0] * d[:, 0]
    cosg += unit[1] * d[:, 1]
    cosg += unit[2] * d[:, 2]
    e = np.radians(site.floor_deg - opts.screen_margin_deg)
    # the widest cap: the satellite's highest point in the chunk, the site's lowest
    gmax = np.arccos(np.clip(float(r_site.min()) * math.cos(e) / r_max, -1.0, 1.0)) - e
    h = np.diff(grid)
    slack = 0.5 * max_rate_rad_s * float(h.max())
    # an interval is a candidate when the mean of its end angles, less the motion, is within
    # the cap; that needs the nearer end within cap + motion, which cosines tell without an
    # arccos, so the exact test runs on those few intervals only
    # (1e-9 rad of margin: the cosine and arccos roundings can never drop a candidate)
    widest = gmax + slack + 1e-9
    near = np.where(widest < np.pi, np.cos(widest), -np.inf)[:, None]
    maybe = np.flatnonzero((np.maximum(cosg[:, :-1], cosg[:, 1:]) >= near) &
                           chunk.valid[:, None])
    s, i = np.divmod(maybe, grid.size - 1)
    ga = np.arccos(np.clip(cosg[s, i], -1.0, 1.0))
    gb = np.arccos(np.clip(cosg[s, i + 1], -1.0, 1.0))
    reach = 0.5 * (ga + gb - max_rate_rad_s * h[i])
    keep = reach <= gmax[s]
    return s[keep], i[keep]


def find_windows(chunk: SkyChunk, site: Site, earth: EarthOrientation, max_rate_rad_s: float,
                 opts: PassOptions | None = None, los_sampler=None) -> tuple[Windows, Windows]:
    """Floor passes and visibility windows of ``site`` within ``chunk``.

    Returns ``(passes, windows)``; both are :class:`Windows`.  In ``passes`` every interval is
    a floor pass (start/end cause floor or edge).  ``windows`` are the parts of passes clear of
    obstructions; with no obstruction they equal the passes.  Intervals open at a chunk edge
    carry ``CAUSE_EDGE`` there and are merged across chunks by the caller.
    """
    return find_windows_many(chunk, [site], earth, max_rate_rad_s, opts, [los_sampler])[0]


def find_windows_many(chunk: SkyChunk, sites: list[Site], earth: EarthOrientation,
                      max_rate_rad_s: float, opts: PassOptions | None = None,
                      los_samplers: list | None = None) -> list[tuple[Windows, Windows]]:
    """:func:`find_windows` for several sites at once: one site of any motion, or any number
    of fixed sites (:func:`is_fixed`).  Returns ``(passes, windows)`` per site, each exactly
    what the site searched alone gives.

    Cost: screening is per site; every later step is one vectorised evaluation for the whole
    group, so grouping removes the per-call overhead that dominates a single site's search
    (about 60 evaluations per chunk, most of a few hundred samples).
    """
    opts = opts or PassOptions()
    los_samplers = los_samplers or [None] * len(sites)
    ev = _GroupEvaluator(chunk, sites, earth)
    n_sat = ev.n_sat
    found = [_screen(chunk, site, earth, opts, max_rate_rad_s) for site in sites]
    s_c = np.concatenate([j * n_sat + sc for j, (sc, _) in enumerate(found)]).astype(np.int64)
    i_c = np.concatenate([ic for _, ic in found]).astype(np.int64)
    if s_c.size == 0:
        return [(Windows.empty(), Windows.empty()) for _ in sites]
    q = max(1, math.ceil(chunk.h_s / opts.sub_step_s))
    sub = chunk.sub_positions(s_c % n_sat, i_c, q)                      # (C, q+1, 3)
    fine_t = chunk.t0_s + np.arange((chunk.grid_s.size - 1) * q + 1) * (chunk.h_s / q)
    fine_t[-1] = chunk.t1_s
    # consecutive candidate intervals of one satellite share an endpoint: keep it once
    cont_next = np.zeros(s_c.size, dtype=bool)
    cont_next[:-1] = (s_c[1:] == s_c[:-1]) & (i_c[1:] == i_c[:-1] + 1)
    keep = np.ones((s_c.size, q + 1), dtype=bool)
    keep[:, -1] = ~cont_next
    run_of_cand = np.cumsum(np.concatenate([[True], ~cont_next[:-1]])) - 1
    kept_at = np.flatnonzero(keep)                   # the samples kept, as flat indices
    cand, step = np.divmod(kept_at, q + 1)            # each one's candidate and sub-step
    col = i_c[cand] * q + step                        # fine-grid index
    sat = s_c[cand]                                   # (site, satellite) keys
    run = run_of_cand[cand]
    t = fine_t[col]
    site_pos, site_up = ev.position_up(None, fine_t)                   # (sites, fine, 3)
    of = sat // n_sat
    at = of * fine_t.size + col                       # flat (site, fine instant) rows: np.take
    kept = np.take(sub.reshape(-1, 3), kept_at, axis=0)               # = sub[keep]
    f = elevation_deg(kept, np.take(site_pos.reshape(-1, 3), at, axis=0),
                      np.take(site_up.reshape(-1, 3), at, axis=0)) - ev.floor_deg[of]
    first = np.concatenate([[True], run[1:] != run[:-1]])
    last = np.concatenate([run[1:] != run[:-1], [True]])
    same = ~last[:-1]
    pos = f > 0.0

    # --- rises and sets bracketed by sign changes
    rise_k = np.flatnonzero(same & ~pos[:-1] & pos[1:])
    set_k = np.flatnonzero(same & pos[:-1] & ~pos[1:])
    # --- grazing passes hidden between samples: refine local maxima of the samples
    interior = np.zeros(t.size, dtype=bool)
    interior[1:-1] = same[:-1] & same[1:]
    lm = interior.copy()
    lm[1:-1] &= (f[1:-1] >= f[:-2]) & (f[1:-1] >= f[2:]) & ~pos[1:-1] & ~pos[:-2] & ~pos[2:]
    lm &= f > -5.0
    lm_k = np.flatnonzero(lm)
    g_t, g_f = parabolic_max(ev.floor_margin, sat[lm_k], t[lm_k - 1], t[lm_k], t[lm_k + 1],
                             f[lm_k - 1], f[lm_k], f[lm_k + 1])
    graze = g_f > 0.0
    gk, gt = lm_k[graze], g_t[graze]

    lo = np.concatenate([t[rise_k], t[gk - 1], t[set_k], gt])
    hi = np.concatenate([t[rise_k + 1], gt, t[set_k + 1], t[gk + 1]])
    bs = np.concatenate([sat[rise_k], sat[gk], sat[set_k], sat[gk]])
    rising = np.concatenate([np.ones(rise_k.size + gk.size, bool), np.zeros(set_k.size + gk.size, bool)])
    roots = bisect(ev.floor_margin, bs, lo, hi, rising, opts.refine_s)
    n_up = rise_k.size + gk.size
    start_t = np.concatenate([roots[:n_up], t[first & pos]])
    start_run = np.concatenate([run[rise_k], run[gk], run[first & pos]])
    start_cause = np.concatenate([np.full(n_up, CAUSE_FLOOR), np.full(int((first & pos).sum()), CAUSE_EDGE)])
    end_t = np.concatenate([roots[n_up:], t[last & pos]])
    end_run = np.concatenate([run[set_k], run[gk], run[last & pos]])
    end_cause = np.concatenate([np.full(roots.size - n_up, CAUSE_FLOOR),
                                np.full(int((last & pos).sum()), CAUSE_EDGE)])
    # an interval open at a sample that is not a chunk edge is a screening slip: keep it as floor
    start_cause[(start_cause == CAUSE_EDGE) & (start_t > chunk.t0_s)] = CAUSE_FLOOR
    end_cause[(end_cause == CAUSE_EDGE) & (end_t < chunk.t1_s)] = CAUSE_FLOOR

    so = np.lexsort((start_t, start_run))
    eo = np.lexsort((end_t, end_run))
    start_t, start_run, start_cause = start_t[so], start_run[so], start_cause[so]
    end_t, end_run, end_cause = end_t[eo], end_run[eo], end_cause[eo]
    if start_t.size != end_t.size or np.any(start_run != end_run) or np.any(end_t < start_t):
        start_t, end_t, start_run, start_cause, end_cause = _pair_leniently(
            start_t, start_run, start_cause, end_t, end_run, end_cause)
    run_sat = sat[first]
    p_key = run_sat[start_run]

    # --- culmination: best sample inside each pass, refined by golden-section
    culm_t, culm_f = _culminate(ev, t, f, ev.floor_deg[of], run, col, fine_t, p_key,
                                 start_run, start_t, end_t)
    p_site, p_sat = ev.split(p_key)
    out = []
    for j, site in enumerate(sites):      # passes are in key order: site by site
        m = np.flatnonzero(p_site == j)
        passes = Windows(p_sat[m].astype(np.int64), start_t[m], end_t[m],
                         start_cause[m].astype(np.int8), end_cause[m].astype(np.int8),
                         culm_t[m], culm_f[m] + site.floor_deg, np.arange(m.size, dtype=np.int64))
        if site.has_obstruction:
            windows = _obstructed(_Evaluator(chunk, site, earth), passes, site, opts,
                                  los_samplers[j])
        else:
            windows = passes
        out.append((passes, windows))
    return out


def _pair_leniently(st, sr, sc, et, er, ec):
    """Pair starts and ends run by run when a numerical slip broke the strict alternation."""
    out = ([], [], [], [], [])
    for r in np.unique(np.concatenate([sr, er])):
        a = np.flatnonzero(sr == r)
        b = np.flatnonzero(er == r)
        j = 0
        for i in a:
            while j < b.size and et[b[j]] < st[i]:
                j += 1
            if j < b.size:
                for lst, val in zip(out, (st[i], et[b[j]], r, sc[i], ec[b[j]])):
                    lst.append(val)
                j += 1
    return tuple(np.asarray(v) for v in out)


PEAK_ROUNDS = 4      # a 60 s bracket to < 1e-4 s on the smooth sin(elevation)
PEAK_TOL_S = 1e-4    # golden section: 1e-4 s is < 1e-4 deg even at a cusp (< 1 deg/s)


def _culminate(ev, t, f, floor_deg, run, col, fine_t, p_sat, p_run, p_start, p_end):
    """Peak of each pass: the best sub-grid sample inside it, refined.

    The refinement maximises sin(elevation), not elevation: near the zenith elevation is
    90 deg minus the off-zenith angle, whose minimum over a pass is a cusp (|t - t0| for an
    overhead pass), where a parabola through three samples misses the peak (by 0.1 deg and
    0.5 s at 89.9 deg culminations); sin(elevation) = cos(off-zenith angle) is smooth there and
    has its maximum at the same instant.  Successive parabolic interpolation (``PEAK_ROUNDS``
    rounds) or, at the ends of a sampled run, golden-section search to ``PEAK_TOL_S``; then
    one evaluation of the elevation at the refined instant.
    """
    n = p_start.size
    if n == 0:
        return np.zeros(0), np.zeros(0)
    # samples strictly inside each pass are contiguous in the flat arrays (runs sorted by time)
    # as integer keys run * (F + 1) + fine-grid index (exact, whatever the number of runs):
    # a sample is after the start when its grid instant is, before the end likewise
    span = fine_t.size + 1
    key = run * span + col
    a = np.searchsorted(key, p_run * span + np.searchsorted(fine_t, p_start, side="right"))
    b = np.searchsorted(key, p_run * span + np.searchsorted(fine_t, p_end, side="left"))
    has = b > a
    best = np.full(n, -1, dtype=np.int64)
    if has.any():
        starts, ends = a[has], b[has]
        seg = np.repeat(np.arange(starts.size), ends - starts)
        flat = _ranges(starts, ends)
        vals = np.where(np.isfinite(f[flat]), f[flat], -np.inf)
        mx = np.full(starts.size, -np.inf)
        np.maximum.at(mx, seg, vals)
        firsts = np.full(starts.size, np.iinfo(np.int64).max, dtype=np.int64)
        np.minimum.at(firsts, seg, np.where(vals == mx[seg], flat, np.iinfo(np.int64).max))
        best[has] = firsts
    # a best sample with both neighbours in its run: refine its parabola; else golden section
    inner = (best > 0) & (best < t.size - 1)
    bi = np.clip(best, 1, t.size - 2)
    inner &= (run[bi - 1] == run[bi]) & (run[bi + 1] == run[bi]) & (best >= 0)
    inner &= (f[bi] >= f[bi - 1]) & (f[bi] >= f[bi + 1])
    ct = np.empty(n)
    sine = np.sin(np.radians(f + floor_deg))          # of the samples' elevations
    ii = np.flatnonzero(inner)
    ct[ii], _ = parabolic_max(ev.sine_elevation, p_sat[ii], t[bi[ii] - 1], t[bi[ii]],
                              t[bi[ii] + 1], sine[bi[ii] - 1], sine[bi[ii]], sine[bi[ii] + 1],
                              rounds=PEAK_ROUNDS)
    oo = np.flatnonzero(~inner)
    lo = np.where(best >= 0, t[np.maximum(best - 1, 0)], p_start)[oo]
    hi = np.where(best >= 0, t[np.minimum(best + 1, t.size - 1)], p_end)[oo]
    lo = np.maximum(lo, p_start[oo])
    hi = np.minimum(hi, p_end[oo])
    ct[oo], _ = golden_max(ev.sine_elevation, p_sat[oo], lo, hi, PEAK_TOL_S)
    cf = ev.floor_margin(p_sat, ct)
    # the peak may sit at an edge of a cut pass
    fs = ev.floor_margin(p_sat, p_start)
    fe = ev.floor_margin(p_sat, p_end)
    ct = np.where(fs > cf, p_start, ct)
    cf = np.maximum(cf, fs)
    ct = np.where(fe > cf, p_end, ct)
    cf = np.maximum(cf, fe)
    return ct, cf


def _ranges(starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
    """Concatenated aranges [s, e) without a Python loop."""
    lengths = ends - starts
    total = int(lengths.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    offs = np.repeat(starts - np.concatenate([[0], np.cumsum(lengths)[:-1]]), lengths)
    return np.arange(total) + offs


def _obstructed(ev: _Evaluator, passes: Windows, site: Site, opts: PassOptions, los_sampler
                ) -> Windows:
    """Split floor passes where obstructions block the satellite.

    Each pass is sampled at its ends and on the global grid k * step inside it.  Mask edges are
    bisected to ``refine_s``; line-of-sight edges (a sampled random state) fall midway between
    samples.
    """
    step = site.sample_step_s
    n = len(passes)
    k0 = np.floor(passes.start_s / step).astype(np.int64) + 1
    k1 = np.ceil(passes.end_s / step).astype(np.int64) - 1
    counts = np.maximum(0, k1 - k0 + 1) + 2
    pid = np.repeat(np.arange(n), counts)
    within = np.arange(pid.size) - np.repeat(np.cumsum(counts) - counts, counts)
    is_first = within == 0
    is_last = within == counts[pid] - 1
    grid_index = k0[pid] + within - 1
    tt = np.where(is_first, passes.start_s[pid],
                  np.where(is_last, passes.end_s[pid], grid_index * step))
    grid_index = np.where(is_first, k0[pid] - 1, grid_index)   # pass ends get their own slots
    grid_index = np.where(is_last, k1[pid] + 1, grid_index)
    sat = passes.sat[pid]
    mask_ok = ev.mask_margin(sat, tt) > 0.0 if site.obstructions else np.ones(tt.size, bool)
    if los_sampler is not None:
        los_ok = los_sampler(site, passes, pid, tt, grid_index, is_first, ev.elevation(sat, tt))
    else:
        los_ok = np.ones(tt.size, bool)
    clear = mask_ok & los_ok
    same = pid[1:] == pid[:-1]
    up_k = np.flatnonzero(same & ~clear[:-1] & clear[1:])
    dn_k = np.flatnonzero(same & clear[:-1] & ~clear[1:])
    # which cause changed across each edge; when both did, the later opening / earlier closing binds
    up_mask = ~mask_ok[up_k] & mask_ok[up_k + 1]
    dn_mask = mask_ok[dn_k] & ~mask_ok[dn_k + 1]
    up_los = ~los_ok[up_k] & los_ok[up_k + 1]
    dn_los = los_ok[dn_k] & ~los_ok[dn_k + 1]
    bk = np.concatenate([up_k[up_mask], dn_k[dn_mask]])
    rising = np.concatenate([np.ones(int(up_mask.sum()), bool), np.zeros(int(dn_mask.sum()), bool)])
    roots = bisect(ev.mask_margin, sat[bk], tt[bk], tt[bk + 1], rising, opts.refine_s)
    up_root = np.full(up_k.size, -np.inf)
    up_root[up_mask] = roots[:int(up_mask.sum())]
    dn_root = np.full(dn_k.size, np.inf)
    dn_root[dn_mask] = roots[int(up_mask.sum()):]
    up_mid = np.where(up_los, 0.5 * (tt[up_k] + tt[up_k + 1]), -np.inf)
    dn_mid = np.where(dn_los, 0.5 * (tt[dn_k] + tt[dn_k + 1]), np.inf)
    up_t = np.maximum(up_root, up_mid)
    dn_t = np.minimum(dn_root, dn_mid)
    up_c = np.where(up_root >= up_mid, CAUSE_OBSTRUCTION, CAUSE_LOS)
    dn_c = np.where(dn_root <= dn_mid, CAUSE_OBSTRUCTION, CAUSE_LOS)
    open_first = is_first & clear
    close_last = is_last & clear
    st = np.concatenate([up_t, tt[open_first]])
    st_p = np.concatenate([pid[up_k], pid[open_first]])
    st_c = np.concatenate([up_c, passes.start_cause[pid[open_first]]])
    en = np.concatenate([dn_t, tt[close_last]])
    en_p = np.concatenate([pid[dn_k], pid[close_last]])
    en_c = np.concatenate([dn_c, passes.end_cause[pid[close_last]]])
    so, eo = np.lexsort((st, st_p)), np.lexsort((en, en_p))
    st, st_p, st_c = st[so], st_p[so], st_c[so]
    en, en_p, en_c = en[eo], en_p[eo], en_c[eo]
    if st.size != en.size or np.any(st_p != en_p):
        st, en, st_p, st_c, en_c = _pair_leniently(st, st_p, st_c, en, en_p, en_c)
    keep = en > st
    st, en, st_p, st_c, en_c = st[keep], en[keep], st_p[keep], st_c[keep], en_c[keep]
    # peak elevation of each window: the pass peak if inside, else the nearer end (passes are
    # unimodal in elevation, so the max over a sub-interval sits at its end closest to the peak)
    pc = passes.culm_s[st_p]
    inside = (pc >= st) & (pc <= en)
    ct = np.where(inside, pc, np.where(pc < st, st, en))
    ce = np.where(inside, passes.culm_el_deg[st_p], ev.elevation(passes.sat[st_p], ct))
    return Windows(passes.sat[st_p], st, en, st_c.astype(np.int8), en_c.astype(np.int8), ct, ce,
                   st_p.astype(np.int64))
