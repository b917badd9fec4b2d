"""The measurement trace of one terminal: what it measured at every measurement instant, for
the serving cell of each policy and the strongest neighbours.

``trace.parquet`` (written by ``dwell run ... --trace TERMINAL``) has one row per policy,
instant and cell: ``policy``, ``time_utc``, ``terminal``, ``cell``, ``satellite``, ``beam``,
``rsrp_dbm`` (layer-3 filtered), ``rsrp_raw_dbm`` (before the filter, with measurement noise),
``sinr_db`` and ``serving`` (the policy's serving cell at that instant).  The measurements are
rebuilt from the run's geometry by a fresh measurement stream: every draw is keyed by its
coordinates, so they are the very values the kernels saw.  Cost: one more measurement pass
over the terminal's rows, plus a sort of each row's cells.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

NEIGHBOURS = 4          # strongest cells besides the serving one, per instant


def trace_frame(scen, geo, site_index: int, results: list, cell_name, period_s: float
                ) -> pd.DataFrame:
    """Trace of the terminal at ``site_index`` (its position in ``geo.sites``) under every
    policy of ``results`` (the RunResults of that terminal)."""
    from ..radio.measure import MeasurementStream

    stream = MeasurementStream(geo, site_index, scen.link, period_s, scen.seed)
    sat_names = np.asarray(scen.constellation.names, dtype=object)
    parts = []
    links = {}
    for res in results:
        lk = res.records.links
        links[res.policy] = (np.array([x[2] for x in lk], dtype=float),
                             np.array([x[3] for x in lk], dtype=float),
                             np.array([x[6] for x in lk], dtype=np.int64))
    k = 0
    while k < stream.K:
        rows = stream.rows(k, k + stream.B)
        stream.release(k + rows.n)
        k += rows.n
        rsrp = np.where(rows.sat >= 0, np.nan_to_num(rows.rsrp_dbm, nan=-np.inf), -np.inf)
        order = np.argsort(-rsrp, axis=1, kind="stable")          # strongest first
        for policy, (a, b, cells) in links.items():
            i = np.searchsorted(a, rows.t_s, side="right") - 1
            on = (i >= 0) & (rows.t_s < b[np.maximum(i, 0)])
            serving = np.where(on, cells[np.maximum(i, 0)], -1)
            is_serv = (rows.cell == serving[:, None]) & (rows.sat >= 0)
            rank = np.empty_like(order)
            np.put_along_axis(rank, order, np.arange(order.shape[1])[None, :], axis=1)
            # neighbours: the strongest cells that are not serving, up to NEIGHBOURS per row
            others = (rows.sat >= 0) & ~is_serv
            nb_rank = np.where(others, rank, np.iinfo(np.int64).max)
            nb_order = np.sort(nb_rank, axis=1)
            cutoff = nb_order[:, min(NEIGHBOURS, nb_order.shape[1]) - 1][:, None] \
                if nb_order.shape[1] else np.zeros((rows.n, 1), dtype=np.int64)
            keep = is_serv | (others & (nb_rank <= cutoff))
            r, c = np.nonzero(keep)
            if r.size == 0:
                continue
            parts.append(pd.DataFrame({
                "policy": policy, "time_utc": rows.t_s[r], "terminal": geo.sites[site_index].name,
                "cell": cell_name(rows.cell[r, c]), "satellite": sat_names[rows.sat[r, c]],
                "beam": rows.beam[r, c].astype(np.int32), "rsrp_dbm": rows.rsrp_dbm[r, c],
                "rsrp_raw_dbm": rows.rsrp_raw_dbm[r, c], "sinr_db": rows.sinr_db[r, c],
                "serving": is_serv[r, c]}))
    if not parts:
        return pd.DataFrame({c: [] for c in ("policy", "time_utc", "terminal", "cell", "satellite",
                                             "beam", "rsrp_dbm", "rsrp_raw_dbm", "sinr_db",
                                             "serving")})
    df = pd.concat(parts, ignore_index=True)
    rank = {name: i for i, name in enumerate(links)}          # policies in the config's order
    df["_p"] = df["policy"].map(rank)
    df = df.sort_values(["_p", "time_utc", "rsrp_dbm"], ascending=[True, True, False],
                        kind="stable")
    return df.drop(columns="_p").reset_index(drop=True)
