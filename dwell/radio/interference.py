"""Co-channel interference and SINR of the cells a terminal measures.

At one measurement instant every cell the terminal sees (a beam of a satellite in view, with
its gain towards the terminal) delivers a power ``S_j``; cells of one reuse colour share a
frequency.  The interference on cell j is the sum of the other co-channel cells' powers, each
weighted by its beam's ``load`` (the fraction of resources it transmits):

    SINR_j = S_j / (N + sum_{i != j, colour_i = colour_j} load_i S_i)

with N the receiver noise over the channel (powers here are already relative to N, i.e. each
cell's SNR in linear units).  With no co-channel cell the SINR is the SNR.  Only the beams
near the terminal's direction of each satellite enter (see :mod:`dwell.radio.cells`): the
others lie beyond the pattern's second sidelobe.  Cost: one ``bincount`` over the samples.
"""

from __future__ import annotations

import numpy as np

N_COLOURS = 7       # the largest reuse factor


def sinr_db(snr_db: np.ndarray, row: np.ndarray, colour: np.ndarray, load: np.ndarray,
            n_rows: int, enabled: bool = True) -> np.ndarray:
    """SINR (dB) of every cell sample from the SNRs of all cell samples at the same instants.

    ``row`` is each sample's instant (0..n_rows-1), ``colour`` its reuse colour and ``load``
    its beam's load; every sample interferes with the co-channel samples of its row.  With
    ``enabled`` false (interference off) the SINR equals the SNR.
    """
    snr_db = np.asarray(snr_db, dtype=float)
    if not enabled or snr_db.size == 0:
        return snr_db.copy()
    s = np.power(10.0, snr_db / 10.0)
    key = np.asarray(row, dtype=np.int64) * N_COLOURS + np.asarray(colour, dtype=np.int64)
    total = np.bincount(key, weights=load * s, minlength=n_rows * N_COLOURS)
    others = np.maximum(total[key] - load * s, 0.0)    # exclude the cell's own power
    return 10.0 * np.log10(s / (1.0 + others))
