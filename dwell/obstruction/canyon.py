"""Stochastic street canyon: one seeded realisation of buildings and the exact mask it casts.

Returns, for a terminal standing or driving in a straight street, the elevation mask (degrees,
-90 where nothing blocks) at any azimuth and along-street position, computed exactly from the
building boxes rather than sampled.

Geometry
--------
- The street axis has azimuth ``alpha`` (degrees from north, clockwise).  Local frame: ``u``
  along the street (unit vector at azimuth ``alpha``), ``w`` across it (azimuth ``alpha + 90``,
  to the right).  A horizontal direction of azimuth ``az`` is ``(cos(az - alpha), sin(az - alpha))``
  in ``(u, w)``.
- Facade planes are at ``w = -width/2`` (side 0, left) and ``w = +width/2`` (side 1, right).
  The antenna is at ``(u, w) = (x, lateral_m)`` with ``|lateral_m| < width/2``, at height
  ``antenna_height_m`` above the ground; ``x`` (``along_m``) is an argument of every query.
- On each side the near-edge positions ``a_i`` form a homogeneous Poisson process of intensity
  ``buildings_per_km`` per side.  Building ``i`` spans ``[a_i, min(a_i + L_i, a_{i+1})]`` along
  the street (truncated at the next start, so one side's buildings never overlap; gaps appear
  where ``L_i`` is shorter than the spacing), runs from its facade plane away from the street by
  ``depth_m`` and has height ``H_i``.  ``L_i`` and ``H_i`` are i.i.d. from their laws
  (:func:`sample_law`).
- A ray of azimuth ``az`` and elevation ``el >= 0`` is blocked by a box iff it enters the box
  below the roof.  The slab method gives the horizontal distance ``r_in`` at which the horizontal
  ray enters the footprint rectangle (through the facade, or through an end wall seen across a
  gap); the height along the ray grows with distance, so the ray is blocked iff
  ``h + r_in tan(el) < H``.  The mask at ``az`` is therefore ``max atan((H - h) / r_in)`` over
  the boxes hit with ``H > h``, and ``-90`` when there is none, so callers can take the maximum
  with their own floor.  Roofs below the antenna and the ground only stop rays below the
  horizon; they are not modelled.

Search window and extent
------------------------
A building whose along-street span is farther than ``R`` from ``x`` is at horizontal distance
``> R`` and can raise the mask only to ``atan((Hmax - h) / R)``.  A query with floor ``f`` uses
``R = min(margin, (Hmax - h) / tan(max(f, 0.5 deg)))``, with ``Hmax`` the tallest building of the
realisation.  The realisation covers ``along_range_m`` (default ``+-street_length_m/2``) plus
``margin = street_length_m / 2`` on each side, so for ``x`` in ``along_range_m`` the mask is exact
wherever it exceeds ``max(f, atan((Hmax - h) / R))``; below that it may miss far buildings.

Cost
----
Generation: ``O(n log n)`` for ``n`` buildings (about ``2 * buildings_per_km`` per km covered).
A query batch of ``Q`` rays costs ``O(Q * K)`` time with ``K ~ 2 R lambda + 2`` buildings per
side in the window (two ``searchsorted`` calls and a padded gather), never ``O(Q * n)``; memory
is bounded by processing the queries in blocks of about 2**20 ray-building pairs.  Only the side
a ray heads towards is examined.  :meth:`Canyon.half_line_cut_tan` costs the same per position.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np
from scipy.special import cosdg, sindg

from ..io.errors import InputError
from ..io.schema import REQUIRED, Field, between, ge, gt, le, number, numbers, text
from ..io.schema import seed as seed_field

LAWS = ("exponential", "deterministic", "lognormal", "pareto", "empirical")
NOTHING_DEG = -90.0            # mask value where no building blocks
_MIN_SEARCH_DEG = 0.5          # floor used for the search radius when the caller's floor is <= 0
_BLOCK_PAIRS = 1 << 20         # ray-building pairs per block (memory bound)


def _law_keys(kind: str, mean: float) -> dict[str, Field]:
    return {
        f"{kind}_law": text("lognormal" if kind == "height" else "exponential", choices=LAWS,
                            doc=f"law of building {kind}s"),
        f"{kind}_mean_m": number(mean, gt(0), doc="mean (exponential, deterministic, lognormal, pareto)"),
        f"{kind}_sigma": number(0.5, gt(0), doc="lognormal: standard deviation of the log"),
        f"{kind}_shape": number(2.5, gt(0), doc="pareto: tail index (> 1; scale gives the mean)"),
        f"{kind}_values_m": numbers(None, doc="empirical: table of values"),
        f"{kind}_weights": numbers(None, doc="empirical: optional weights, one per value"),
    }


KEYS: dict[str, Field] = {
    "width_m": number(REQUIRED, gt(0), doc="street width, facade to facade"),
    "azimuth_deg": number(0.0, between(-360, 360), doc="street axis, from north clockwise"),
    "antenna_height_m": number(1.5, ge(0), doc="antenna height above the street"),
    "lateral_m": number(0.0, doc="antenna offset from the centreline, positive to the right"),
    # at most one building start per metre of street and side: common practice (no building
    # is narrower), and what keeps a realisation's size sane (see dwell.io.estimate)
    "buildings_per_km": number(60.0, gt(0), le(1000), doc="building starts per km, per side"),
    "depth_m": number(15.0, gt(0), doc="building depth away from the street"),
    **_law_keys("height", 20.0),
    **_law_keys("length", 25.0),
    "street_length_m": number(2000.0, gt(0), doc="street generated, centred on the start"),
    "seed": seed_field(),
}


def _filled(params: dict) -> dict[str, Any]:
    """``params`` with every missing optional key set to its default."""
    out = dict(params)
    for key, f in KEYS.items():
        if key not in out:
            if f.default is REQUIRED:
                raise InputError("canyon parameters", f"canyon.{key}", None, "missing required key",
                                 show_value=False)
            out[key] = f.default
    return out


def check(params: dict, source: str, where: str) -> None:
    """Cross-field checks of a ``[terminal.canyon]`` table already checked against ``KEYS``."""
    p = _filled(params)

    def bad(key: str, reason: str) -> InputError:
        return InputError(source, f"{where}.canyon.{key}", p[key], reason)

    if abs(p["lateral_m"]) >= p["width_m"] / 2.0:
        raise bad("lateral_m", f"must be inside the street: |lateral_m| < width_m/2 = {p['width_m'] / 2:g}")
    for kind in ("height", "length"):
        law = p[f"{kind}_law"]
        if law == "pareto" and p[f"{kind}_shape"] <= 1.0:
            raise bad(f"{kind}_shape", "pareto needs a finite mean: shape must be > 1")
        if law != "empirical":
            continue
        values, weights = p[f"{kind}_values_m"], p[f"{kind}_weights"]
        if not values:
            raise bad(f"{kind}_values_m", f"{kind}_law = 'empirical' needs a non-empty list of values")
        if min(values) < 0:
            raise bad(f"{kind}_values_m", "values must be >= 0")
        if weights is not None:
            if len(weights) != len(values):
                raise bad(f"{kind}_weights", f"needs one weight per value ({len(values)})")
            if min(weights) < 0 or sum(weights) <= 0:
                raise bad(f"{kind}_weights", "weights must be >= 0 with a positive sum")


def sample_law(rng: np.random.Generator, law: str, mean: float, sigma: float, shape: float,
               values: Sequence[float] | None, weights: Sequence[float] | None,
               size: int) -> np.ndarray:
    """``size`` i.i.d. draws from one of ``LAWS`` (shared by heights and facade lengths).

    exponential and deterministic have mean ``mean``; lognormal has ``sd(ln X) = sigma`` and
    ``mu = ln(mean) - sigma^2/2`` so that ``E[X] = mean``; pareto (type I) has tail index
    ``shape`` and scale ``mean (shape - 1) / shape`` so that ``E[X] = mean``; empirical draws
    from ``values`` with probabilities proportional to ``weights`` (equal if ``None``).
    """
    if law == "exponential":
        return rng.exponential(mean, size)
    if law == "deterministic":
        return np.full(size, float(mean))
    if law == "lognormal":
        return rng.lognormal(math.log(mean) - 0.5 * sigma ** 2, sigma, size)
    if law == "pareto":
        # numpy's pareto is the Lomax law; 1 + Lomax is the type I law of unit scale
        return mean * (shape - 1.0) / shape * (1.0 + rng.pareto(shape, size))
    if law == "empirical":
        v = np.asarray(values, dtype=float)
        p = None if weights is None else np.asarray(weights, dtype=float) / float(np.sum(weights))
        return rng.choice(v, size=size, p=p)
    raise ValueError(f"unknown law {law!r} (known: {', '.join(LAWS)})")


def frechet_cdf(t: np.ndarray, intensity_per_m: float, mean_excess_height_m: float) -> np.ndarray:
    """Law of the half-line cut: ``P(tan theta <= t) = exp(-lambda E[(H - h)+] / t)``.

    The largest blocking tangent seen along a half-line of Poisson building starts (intensity
    ``lambda``) with i.i.d. excess heights is Frechet of shape 1 with scale ``lambda E[(H-h)+]``.
    """
    t = np.asarray(t, dtype=float)
    scale = float(intensity_per_m) * float(mean_excess_height_m)
    if scale <= 0.0:
        return np.where(t >= 0.0, 1.0, 0.0)
    with np.errstate(divide="ignore"):
        return np.where(t > 0.0, np.exp(-scale / np.where(t > 0.0, t, 1.0)), 0.0)


@dataclass(frozen=True)
class Side:
    """The buildings of one side: sorted starts, ends, heights and the footprint's across range."""

    start_m: np.ndarray
    end_m: np.ndarray
    height_m: np.ndarray
    w_lo_m: float
    w_hi_m: float


def _slab(p: np.ndarray, d: np.ndarray, lo: np.ndarray | float, hi: np.ndarray | float):
    """Ray parameter interval inside ``lo <= p + t d <= hi`` (empty as (inf, -inf))."""
    zero = d == 0.0
    ds = np.where(zero, 1.0, d)
    t1, t2 = (lo - p) / ds, (hi - p) / ds
    inside = (lo <= p) & (p <= hi)
    t_lo = np.where(zero, np.where(inside, -np.inf, np.inf), np.minimum(t1, t2))
    t_hi = np.where(zero, np.where(inside, np.inf, -np.inf), np.maximum(t1, t2))
    return t_lo, t_hi


class Canyon:
    """One realisation of a street canyon (see the module docstring for the geometry).

    ``params`` is a ``[terminal.canyon]`` table (missing optional keys take their defaults);
    ``params["seed"]`` overrides ``seed`` when set.  ``along_range_m`` is the along-street range
    the terminal may occupy (default ``+-street_length_m/2``).
    """

    def __init__(self, params: dict, seed: int, along_range_m: tuple[float, float] | None = None):
        p = _filled(params)
        check(p, "canyon parameters", "terminal")
        self._set_street(p)
        half = p["street_length_m"] / 2.0
        lo, hi = (-half, half) if along_range_m is None else map(float, along_range_m)
        if hi < lo:
            raise ValueError(f"along_range_m = {along_range_m!r} must be increasing")
        self.along_range_m = (lo, hi)
        self.margin_m = half
        self.covered_m = (lo - half, hi + half)
        self.seed = seed if p["seed"] is None else p["seed"]
        rng = np.random.default_rng(self.seed)
        span = self.covered_m[1] - self.covered_m[0]
        sides = []
        for _ in range(2):
            n = int(rng.poisson(self.intensity_per_m * span))
            start = np.sort(rng.uniform(self.covered_m[0], self.covered_m[1], n))
            length = sample_law(rng, p["length_law"], p["length_mean_m"], p["length_sigma"],
                                p["length_shape"], p["length_values_m"], p["length_weights"], n)
            height = sample_law(rng, p["height_law"], p["height_mean_m"], p["height_sigma"],
                                p["height_shape"], p["height_values_m"], p["height_weights"], n)
            sides.append((start, length, height))
        self._set_sides([(s, np.minimum(s + L, np.append(s[1:], np.inf)), H) for s, L, H in sides])

    @classmethod
    def from_buildings(cls, params: dict, left, right, margin_m: float = 1.0e4) -> "Canyon":
        """A canyon with given buildings: ``left`` and ``right`` are ``(start_m, end_m, height_m)``
        arrays (non-overlapping spans); for closed-form cases and tests."""
        self = cls.__new__(cls)
        p = _filled(params)
        check(p, "canyon parameters", "terminal")
        self._set_street(p)
        self.along_range_m, self.margin_m, self.seed = (0.0, 0.0), float(margin_m), None
        self.covered_m = (-self.margin_m, self.margin_m)
        sides = []
        for s, e, H in (left, right):
            s, e, H = (np.atleast_1d(np.asarray(v, dtype=float)) for v in (s, e, H))
            order = np.argsort(s)
            sides.append((s[order], e[order], H[order]))
        self._set_sides(sides)
        return self

    def _set_street(self, p: dict) -> None:
        self.params = p
        self.width_m = float(p["width_m"])
        self.azimuth_deg = float(p["azimuth_deg"])
        self.antenna_height_m = float(p["antenna_height_m"])
        self.lateral_m = float(p["lateral_m"])
        self.depth_m = float(p["depth_m"])
        self.intensity_per_m = float(p["buildings_per_km"]) / 1000.0

    def _set_sides(self, sides) -> None:
        half, d = self.width_m / 2.0, self.depth_m
        spans = ((-half - d, -half), (half, half + d))
        self.sides = [Side(s, e, H, lo, hi) for (s, e, H), (lo, hi) in zip(sides, spans)]
        self.max_height_m = float(max([0.0] + [float(s.height_m.max()) for s in self.sides
                                               if s.height_m.size]))
        # upper bound of the mask: the tallest building on the nearest facade
        near_m = half - abs(self.lateral_m)
        excess = self.max_height_m - self.antenna_height_m
        self.max_deg = math.degrees(math.atan2(excess, near_m)) if excess > 0 else NOTHING_DEG

    def search_radius_m(self, floor_deg: float = 0.0) -> float:
        """Along-street window half-width for a query floor (0 when no building tops the antenna)."""
        excess = self.max_height_m - self.antenna_height_m
        if excess <= 0.0:
            return 0.0
        return min(self.margin_m, excess / math.tan(math.radians(max(floor_deg, _MIN_SEARCH_DEG))))

    @staticmethod
    def _window(lo: np.ndarray, hi: np.ndarray, n: int):
        """Padded gather indices ``lo + k`` for ``k < hi - lo`` (clipped) and their validity."""
        count = np.maximum(hi - lo, 0)
        k = np.arange(int(count.max()) if count.size else 0)
        idx = np.minimum(lo[:, None] + k, max(n - 1, 0))
        return idx, k < count[:, None]

    def _side_mask(self, side: Side, x: np.ndarray, du: np.ndarray, dw: np.ndarray,
                   radius_m: float) -> np.ndarray:
        out = np.full(x.shape, NOTHING_DEG)
        n = side.start_m.size
        if n == 0 or x.size == 0:
            return out
        # end_m is sorted too (spans never overlap), so both window edges are searchsorted
        lo = np.searchsorted(side.end_m, x - radius_m, side="right")
        hi = np.searchsorted(side.start_m, x + radius_m, side="left")
        width = int(np.maximum(hi - lo, 0).max())
        if width == 0:
            return out
        block = max(1, _BLOCK_PAIRS // width)
        h, y = self.antenna_height_m, self.lateral_m
        for b in range(0, x.size, block):
            sl = slice(b, b + block)
            idx, valid = self._window(lo[sl], hi[sl], n)
            xs, dus, dws = x[sl, None], du[sl, None], dw[sl, None]
            tu_lo, tu_hi = _slab(xs, dus, side.start_m[idx], side.end_m[idx])
            tw_lo, tw_hi = _slab(np.full_like(xs, y), dws, side.w_lo_m, side.w_hi_m)
            r_in = np.maximum(tu_lo, tw_lo)
            hit = valid & (r_in < np.minimum(tu_hi, tw_hi)) & (r_in > 0.0)
            excess = side.height_m[idx] - h
            hit &= excess > 0.0
            el = np.where(hit, np.degrees(np.arctan2(np.where(hit, excess, 0.0),
                                                     np.where(hit, r_in, 1.0))), NOTHING_DEG)
            out[sl] = el.max(axis=1)
        return out

    def mask_elevation_deg(self, azimuth_deg: np.ndarray | float, along_m: np.ndarray | float = 0.0,
                           floor_deg: float = 0.0) -> np.ndarray:
        """Exact mask (deg; -90 where nothing blocks) at azimuths and along-street positions.

        ``azimuth_deg`` and ``along_m`` broadcast; values below ``floor_deg`` may omit far
        buildings (see the module docstring).
        """
        az, x = np.broadcast_arrays(np.asarray(azimuth_deg, dtype=float),
                                    np.asarray(along_m, dtype=float))
        shape = az.shape
        az, x = az.ravel(), x.ravel()
        out = np.full(az.shape, NOTHING_DEG)
        radius_m = self.search_radius_m(floor_deg)
        if radius_m <= 0.0:
            return out.reshape(shape)
        rel = az - self.azimuth_deg
        du, dw = cosdg(rel), sindg(rel)  # exact zeros along and across the street
        for side, heading in zip(self.sides, (dw < 0.0, dw > 0.0)):
            q = np.flatnonzero(heading)  # a ray only reaches the side it heads towards
            out[q] = self._side_mask(side, x[q], du[q], dw[q], radius_m)
        return out.reshape(shape)

    def mask_table(self, along_m: float = 0.0, step_deg: float = 0.1) -> tuple[np.ndarray, np.ndarray]:
        """Azimuths ``0, step, ..., < 360`` and the exact mask there (for CSV export, plots)."""
        n = int(round(360.0 / step_deg))
        az = np.arange(n) * step_deg
        az = az[az < 360.0 - 1e-9]
        return az, self.mask_elevation_deg(az, along_m)

    def half_line_cut_tan(self, side: int, along_m: np.ndarray) -> np.ndarray:
        """2-D cut along the street on one side (0 left, 1 right).

        For an observer on that facade line at along-street ``x`` and the antenna height, looking
        along ``+u``: ``max over a_i > x of (H_i - h)+ / (a_i - x)`` over the near edges (0 when
        none), within the search radius of :meth:`search_radius_m` (floor 0).
        """
        s = self.sides[side]
        x = np.atleast_1d(np.asarray(along_m, dtype=float))
        shape = np.shape(along_m)
        x = x.ravel()
        out = np.zeros(x.shape)
        radius_m = self.search_radius_m(0.0)
        n = s.start_m.size
        if n == 0 or radius_m <= 0.0:
            return out.reshape(shape)
        lo = np.searchsorted(s.start_m, x, side="right")
        hi = np.searchsorted(s.start_m, x + radius_m, side="right")
        width = int(np.maximum(hi - lo, 0).max())
        if width == 0:
            return out.reshape(shape)
        block = max(1, _BLOCK_PAIRS // width)
        for b in range(0, x.size, block):
            sl = slice(b, b + block)
            idx, valid = self._window(lo[sl], hi[sl], n)
            excess = np.maximum(s.height_m[idx] - self.antenna_height_m, 0.0)
            gap = np.where(valid, s.start_m[idx] - x[sl, None], 1.0)
            out[sl] = np.where(valid, excess / gap, 0.0).max(axis=1)
        return out.reshape(shape)
