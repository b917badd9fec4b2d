"""Crossings of hexagonal lattice-cell boundaries by a straight track (Earth-moving beams).

A standing terminal under beams fixed in the satellite frame sees the beams' ground footprints
sweep past it; where the footprints form a hexagonal lattice moving rigidly, the terminal changes
beam each time it crosses a cell boundary of the moving lattice.  Derivation in
``docs/hex-lattice-crossings.md``.  Cost: O(1).
"""

from __future__ import annotations

import numpy as np


def hex_lattice_crossings_per_length(spacing: np.ndarray | float,
                                     heading_rad: np.ndarray | float) -> np.ndarray:
    """Mean number of cell-boundary crossings per unit length of a straight track through the
    hexagonal cells (Voronoi cells, nearest-centre assignment) of a triangular lattice whose
    neighbouring centres are ``spacing`` apart, for a track at angle ``heading_rad`` to a
    lattice axis (a direction from one centre to a neighbour).

    Cauchy-Crofton formula of integral geometry (Santalo, Integral Geometry and Geometric
    Probability, 1976): a random line of fixed direction theta meets straight segments of
    direction phi and length density ``L_A`` (length per unit area) ``L_A |sin(theta - phi)|``
    times per unit length.  The cell edges are the perpendicular bisectors of neighbouring
    centres, three families at 30, 90 and 150 deg to the lattice axis, each of length density
    ``2 / (3 sqrt(3) s) = 2 / (3 spacing)`` (one edge of side ``s = spacing / sqrt(3)`` per
    family per cell of area ``sqrt(3) spacing^2 / 2``), so

        crossings per length = (2 / (3 spacing)) * sum_k |sin(theta - phi_k)|,

    which is ``4 / (3 spacing)`` along a lattice axis, ``2 / (sqrt(3) spacing)`` (the most,
    across it) at 30 deg, and ``4 / (pi spacing)`` averaged over directions (``E|sin| = 2/pi``).
    The mean holds for any track offset (a uniformly placed track, or a long one); units: the
    inverse of ``spacing``'s.  Broadcasts over both arguments.
    """
    d = np.asarray(spacing, dtype=float)
    theta = np.asarray(heading_rad, dtype=float)
    edges = np.radians([30.0, 90.0, 150.0])
    total = sum(np.abs(np.sin(theta - phi)) for phi in edges)
    return 2.0 / (3.0 * d) * total


def hex_lattice_mean_crossings_per_length(spacing: np.ndarray | float) -> np.ndarray:
    """Direction average of :func:`hex_lattice_crossings_per_length`: ``4 / (pi spacing)``."""
    return 4.0 / (np.pi * np.asarray(spacing, dtype=float))
