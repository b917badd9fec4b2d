"""Scenario time: seconds since the scenario start, and their UTC / Julian-date forms.

Inside the engine every instant is ``t_s``, float seconds since the scenario start (float64 keeps
microseconds over years).  Only the edges convert: SGP4 wants split Julian dates (UTC, as TLE
epochs are), output tables want UTC timestamps.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass

import numpy as np
from sgp4.api import jday

UTC = _dt.timezone.utc
SGP4_EPOCH0_JD = 2433281.5  # 1949-12-31 00:00 UTC, the origin of sgp4init's epoch argument


def parse_utc(value: object) -> _dt.datetime:
    """Parse an ISO-8601 instant that is explicitly UTC (``Z`` or ``+00:00``).

    Raises ``ValueError`` with a short reason otherwise (naive times are refused: a study must
    not depend on the machine's zone).
    """
    if isinstance(value, _dt.datetime):
        moment = value
    elif isinstance(value, str):
        text = value.strip()
        if text.endswith(("Z", "z")):
            text = text[:-1] + "+00:00"
        try:
            moment = _dt.datetime.fromisoformat(text)
        except ValueError:
            raise ValueError("must be an ISO-8601 UTC time such as 2027-05-10T00:00:00Z") from None
    else:
        raise ValueError("must be an ISO-8601 UTC time such as 2027-05-10T00:00:00Z")
    if moment.tzinfo is None or moment.utcoffset() != _dt.timedelta(0):
        raise ValueError("must be UTC (end it with Z or +00:00)")
    return moment.astimezone(UTC)


@dataclass(frozen=True)
class Epoch:
    """The scenario origin; converts ``t_s`` to SGP4 dates and to UTC timestamps."""

    start: _dt.datetime

    @property
    def jd_fr(self) -> tuple[float, float]:
        s = self.start
        return jday(s.year, s.month, s.day, s.hour, s.minute, s.second + s.microsecond * 1e-6)

    def julian(self, t_s: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Split Julian dates (whole part, fraction) for SGP4, keeping float64 precision."""
        jd0, fr0 = self.jd_fr
        t = np.asarray(t_s, dtype=float)
        fr = fr0 + t / 86400.0
        whole = np.floor(fr)
        return jd0 + whole, fr - whole

    def sgp4_epoch_days(self) -> float:
        """The scenario start as sgp4init wants it: days since 1949-12-31 00:00 UTC."""
        jd0, fr0 = self.jd_fr
        return (jd0 - SGP4_EPOCH0_JD) + fr0

    def utc(self, t_s: np.ndarray) -> np.ndarray:
        """UTC timestamps (numpy datetime64[us]) for scenario seconds, rounded to 1 us."""
        base = np.datetime64(self.start.replace(tzinfo=None), "us")
        us = np.rint(np.asarray(t_s, dtype=float) * 1e6).astype("int64")
        return base + us.astype("timedelta64[us]")

    def seconds_since(self, moment: _dt.datetime) -> float:
        """Seconds from the scenario start to ``moment`` (aware datetime)."""
        return (moment - self.start).total_seconds()

    def iso(self) -> str:
        return self.start.strftime("%Y-%m-%dT%H:%M:%S") + (
            f".{self.start.microsecond:06d}" if self.start.microsecond else "") + "Z"
