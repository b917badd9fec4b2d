"""Counter-based random numbers: the same (seed, stream, key, index) always gives the same draw.

Per-sample randomness (measurement noise, shadowing, line-of-sight states) must not depend on how
the run is chunked in time or split over workers, so draws are a pure function of their
coordinates: a SplitMix64 finaliser (Steele, Lea and Flood, "Fast splittable pseudorandom number
generators", OOPSLA 2014) over the mixed integer key, mapped to (0, 1) and, for normals, through
the inverse normal CDF (``scipy.special.ndtri``).  Cost: about 15 integer ops per draw.
"""

from __future__ import annotations

import zlib

import numpy as np
from scipy.special import ndtri

_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def stream_id(name: str) -> int:
    """A stable integer for a named stream ("shadowing", "los", ...)."""
    return zlib.crc32(name.encode())


def _mix(x: np.ndarray) -> np.ndarray:
    """SplitMix64's finaliser, in place on a uint64 array (returns it)."""
    x ^= x >> np.uint64(30)
    x *= _M1
    x ^= x >> np.uint64(27)
    x *= _M2
    x ^= x >> np.uint64(31)
    return x


def _seed_state(seed: int, stream: int) -> np.uint64:
    """The (seed, stream) part of every draw's state: the same for all of a call's draws, so
    mixed once as a scalar."""
    x = np.array([(int(seed) * 0x9E3779B97F4A7C15 + int(stream)) % 2 ** 64], dtype=np.uint64)
    with np.errstate(over="ignore"):
        x += _GOLDEN
        return _mix(x)[0]


def uniform(seed: int, stream: int, key: np.ndarray | int, index: np.ndarray | int) -> np.ndarray:
    """Uniform draws in the open interval (0, 1), one per broadcast element of key x index."""
    key, index = np.broadcast_arrays(np.asarray(key, dtype=np.int64), np.asarray(index, dtype=np.int64))
    with np.errstate(over="ignore"):
        x = key.astype(np.uint64)
        x *= _GOLDEN
        x ^= _seed_state(seed, stream)
        x = _mix(x)
        y = index.astype(np.uint64)
        y *= _M1
        y += _GOLDEN
        x ^= y
        x = _mix(x)
    x >>= np.uint64(11)
    out = x.astype(np.float64)
    out += 0.5
    out *= 1.0 / 2 ** 53
    return out if out.ndim else out[()]


def normal(seed: int, stream: int, key: np.ndarray | int, index: np.ndarray | int) -> np.ndarray:
    """Standard normal draws, a pure function of their coordinates."""
    return ndtri(uniform(seed, stream, key, index))
