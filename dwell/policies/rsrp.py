"""Strongest filtered RSRP: switch when another cell's layer-3 filtered RSRP (a beam of any
satellite, the serving one's included) beats the serving cell by more than ``hysteresis_db``
(no time-to-trigger; see :mod:`.a3` for that)."""

from __future__ import annotations

import numpy as np

from ..io.schema import ge, number
from . import register
from .geometric import _RowRule


@register
class StrongestRsrp(_RowRule):
    rule = "strongest-rsrp"
    KEYS = {"hysteresis_db": number(0.0, ge(0), doc="RSRP margin a new satellite needs")}
    loss_aware = False           # it learns of a loss only through its measurements
    trigger = "rsrp"
    margin_key = "hysteresis_db"
    per_cell = True

    def score(self, rows, r):
        return np.nan_to_num(rows.rsrp_dbm[r], nan=-np.inf)
