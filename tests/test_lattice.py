"""Hexagonal lattice-cell boundary crossings (dwell.analysis.lattice,
docs/hex-lattice-crossings.md) against Monte Carlo of straight tracks over the lattice."""

from __future__ import annotations

import math

import numpy as np
import pytest

from dwell.analysis.lattice import (hex_lattice_crossings_per_length,
                                    hex_lattice_mean_crossings_per_length)


def _nearest_centre(points: np.ndarray, spacing: float) -> np.ndarray:
    """Integer coordinates (i, j) of the nearest point of the triangular lattice
    i a1 + j a2, a1 = (d, 0), a2 = (d/2, d sqrt(3)/2) (the Voronoi cell of a lattice point is
    the set of points nearest to it): the nearest of the four corners of the lattice
    parallelogram holding each point (a parallelogram's corners include its points' nearest
    lattice point for this 60-degree basis)."""
    basis = np.array([[spacing, spacing / 2], [0.0, spacing * math.sqrt(3) / 2]])
    frac = points @ np.linalg.inv(basis).T
    base = np.floor(frac).astype(np.int64)
    best = np.full(points.shape[:-1], np.inf)
    idx = np.zeros(points.shape, dtype=np.int64)
    for di in (0, 1):
        for dj in (0, 1):
            cand = base + np.array([di, dj])
            dist = np.sum((points - cand @ basis.T) ** 2, axis=-1)
            better = dist < best
            best = np.where(better, dist, best)
            idx = np.where(better[..., None], cand, idx)
    return idx


def _crossings_mc(spacing, theta, tracks, length, step, seed, refine=1024):
    """Straight tracks of `length` at angle theta to the lattice axis, each from a uniform
    random start over one lattice cell; changes of the nearest centre per unit length, one
    value per track.  A straight track meets each convex cell in one segment and never comes
    back, so every sampling step holding a crossing has different cells at its two ends; those
    steps are resampled at `refine` points and their changes counted."""
    rng = np.random.default_rng(seed)
    s = np.arange(0.0, length + step / 2, step)
    direction = np.array([math.cos(theta), math.sin(theta)])
    basis = np.array([[spacing, 0.0], [spacing / 2, spacing * math.sqrt(3) / 2]])
    starts = rng.uniform(0, 1, (tracks, 2)) @ basis
    pts = starts[:, None, :] + s[None, :, None] * direction
    idx = _nearest_centre(pts, spacing)
    changed = np.any(idx[:, 1:] != idx[:, :-1], axis=-1)
    tr, k = np.nonzero(changed)
    sub = np.linspace(0.0, step, refine + 1)
    fine = pts[tr, k][:, None, :] + sub[None, :, None] * direction
    fidx = _nearest_centre(fine, spacing)
    per_step = np.count_nonzero(np.any(fidx[:, 1:] != fidx[:, :-1], axis=-1), axis=1)
    return np.bincount(tr, weights=per_step, minlength=tracks) / length


@pytest.mark.parametrize("spacing, theta_deg", [(1.0, 0.0), (1.0, 30.0), (2.5, 13.0),
                                                (0.7, 77.0)])
def test_hex_crossings_against_random_tracks(spacing, theta_deg):
    # Cauchy-Crofton (Santalo 1976) for the three edge families; Monte Carlo of straight tracks
    # with nearest-centre assignment.  Tolerance: 5 standard errors over 60 independent tracks
    # (random starts) plus 1e-4 relative for the resolution (steps of 0.02 spacing resampled
    # at 1024 points where the cell changes: two crossings within 2e-5 spacing, i.e. a track
    # that close to a cell corner, have a chance of about 3.5 x 2e-5 per crossing, corner
    # density 4/(sqrt3 d^2)).
    theta = math.radians(theta_deg)
    got = _crossings_mc(spacing, theta, 60, 40.0 * spacing, 0.02 * spacing, seed=7)
    want = float(hex_lattice_crossings_per_length(spacing, theta))
    se = got.std(ddof=1) / math.sqrt(got.size)
    assert abs(got.mean() - want) < 5 * se + 1e-4 * want


def test_hex_crossings_worked_values_and_direction_average():
    # By hand from the formula's three terms (common geometry): along a lattice axis
    # 1 + 1/2 + 1/2 = 2 -> 4/(3d); across it (30 deg) sqrt3/2 + sqrt3/2 + 0 -> 2/(sqrt3 d);
    # the direction average 3 * (2/(3d)) * (2/pi) = 4/(pi d) (E|sin| = 2/pi), and a random
    # direction Monte Carlo of the formula itself agrees.  tolerance: float rounding; the
    # direction average by 1e6 uniform directions to 5 standard errors.
    d = 3.0
    assert float(hex_lattice_crossings_per_length(d, 0.0)) == pytest.approx(4 / (3 * d))
    assert float(hex_lattice_crossings_per_length(d, math.pi / 3)) == pytest.approx(4 / (3 * d))
    assert float(hex_lattice_crossings_per_length(d, math.pi / 6)) == pytest.approx(
        2 / (math.sqrt(3) * d))
    theta = np.random.default_rng(3).uniform(0, 2 * math.pi, 1_000_000)
    vals = hex_lattice_crossings_per_length(d, theta)
    assert abs(vals.mean() - float(hex_lattice_mean_crossings_per_length(d))) < \
        5 * vals.std() / math.sqrt(vals.size)
    assert float(hex_lattice_mean_crossings_per_length(d)) == pytest.approx(4 / (math.pi * d))
