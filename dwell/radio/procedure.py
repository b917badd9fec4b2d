"""The handover procedure between a decision and service on the target (TS 38.300 section
9.2.3.2, Figure 9.2.3.2.1-1; NTN delays after TR 38.821 section 7.3).

A decision at ``t_d`` becomes service on the target through these steps (``procedure = "nr"``;
``"instant"`` keeps the older model: the handover takes effect at the decision):

1. measurement report to the network (decisions of measurement-based rules, A3 and strongest
   RSRP): one-way delay terminal -> gNB, the service link plus, for a transparent payload, the
   feeder link;
2. network decision (``decision_s``) and, for a target on another satellite, preparation with
   the target gNB (``handover_preparation_s``);
3. RRC reconfiguration to the terminal: the same one-way delay back; it arrives at ``t_cmd``;
   ephemeris-based decisions (geometric rules, losses, cell switches) and conditional
   handover (executed by the terminal on a command prepared earlier) start here, ``t_cmd = t_d``;
4. the terminal processes it (``rrc_processing_s``, TS 38.331 section 12: 10 ms, from memory),
   leaves the source at ``t_leave`` and starts T304;
5. access on the target: random access (4-step RACH: two round trips to the target) or
   RACH-less (one one-way uplink), plus ``access_processing_s`` (TS 38.133 6.1.1.2.2: 20 ms
   processing + 2 ms margin, from memory), after any re-pointing of a break-before-make
   antenna: complete at ``t_done``.

Outcomes: ``success``; ``too-late`` when the source link fails (T310 expiry) before
``t_leave``; ``failure`` when the target cell is not fit for access at ``t_done`` (not measured,
or its SINR below Q_out) or access would outlast T304 (counted from the start of access: the
antenna's re-pointing comes first and is the terminal's own): handover failure at T304's
expiry,
then re-establishment as after a radio link failure.  The break of a break-before-make
handover is ``t_done - t_leave``; a make-before-break terminal keeps the source until the
target is ready and breaks for ``mbb_interruption_s``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from ..io.schema import Field, between, ge, number, text
from ..orbits.frames import MEAN_EARTH_RADIUS_KM as R_EARTH_KM
from ..orbits.frames import SPEED_OF_LIGHT_KM_S as C_KM_S
from ..orbits.look import slant_range_km

T304_VALUES_MS = (50, 100, 150, 200, 500, 1000, 2000, 10000)   # TS 38.331 T304

KEYS: dict[str, Field] = {
    "procedure": text("nr", choices=("nr", "instant"),
                      doc="nr: the handover's signalling and access take time and may fail; "
                          "instant: it takes effect at the decision (the older model)"),
    "decision_s": number(0.005, between(0, 10), doc="network's processing of a measurement "
                         "report (illustrative, common practice)"),
    "handover_preparation_s": number(0.010, between(0, 10),
                                     doc="preparation with the target gNB for a target on "
                                         "another satellite (Xn request and acknowledgement; "
                                         "illustrative, common practice)"),
    "rrc_processing_s": number(0.010, between(0, 1),
                               doc="terminal's processing of the RRC reconfiguration (TS 38.331 "
                                   "section 12: 10 ms, from memory)"),
    "access": text("rach", choices=("rach", "rach-less"),
                   doc="random access on the target (4-step: two round trips) or RACH-less"),
    "access_processing_s": number(0.022, between(0, 1),
                                  doc="T_processing + T_margin of the handover interruption "
                                      "(TS 38.133 6.1.1.2.2: 20 + 2 ms, from memory)"),
    "t304_s": number(1.0, between(0.05, 10), doc="T304: handover failure if access is not "
                     "complete by then (TS 38.331: 50-10000 ms)"),
}

LINK_KEYS: dict[str, Field] = {
    "payload": text("transparent", choices=("transparent", "regenerative"),
                    doc="transparent: the gNB is on the ground behind a feeder link; "
                        "regenerative: on the satellite (TR 38.821)"),
    "gateway_elevation_deg": number(10.0, between(0, 90),
                                    doc="elevation of the feeder link at the gateway, for its "
                                        "delay (TR 38.821 uses 10 deg, from memory)"),
}

MEASUREMENT_TRIGGERS = ("a3", "rsrp")      # decisions that need a measurement report


@dataclass(frozen=True)
class ProcedureSettings:
    model: str
    decision_s: float
    preparation_s: float
    rrc_s: float
    rach: bool
    access_s: float
    t304_s: float
    transparent: bool
    gateway_elevation_deg: float

    @classmethod
    def of(cls, policy_params: dict[str, Any], link_params: dict[str, Any]) -> "ProcedureSettings":
        p = {k: f.default for k, f in KEYS.items()}
        p.update({k: v for k, v in policy_params.items() if k in KEYS})
        lk = {k: f.default for k, f in LINK_KEYS.items()}
        lk.update({k: v for k, v in link_params.items() if k in LINK_KEYS})
        return cls(p["procedure"], float(p["decision_s"]), float(p["handover_preparation_s"]),
                   float(p["rrc_processing_s"]), p["access"] == "rach",
                   float(p["access_processing_s"]), float(p["t304_s"]),
                   lk["payload"] == "transparent", float(lk["gateway_elevation_deg"]))

    def one_way_s(self, range_km: float, elevation_deg: float) -> float:
        """Terminal -> gNB delay over the service link (and the feeder link of a transparent
        payload, whose length is the slant range at the gateway's elevation for the
        satellite's altitude, found from the service link's range and elevation)."""
        if not math.isfinite(range_km):
            return 0.0
        delay = range_km / C_KM_S
        if self.transparent:
            R = R_EARTH_KM
            e = math.radians(elevation_deg)
            r_sat = math.sqrt(R * R + range_km * range_km + 2 * R * range_km * math.sin(e))
            delay += float(slant_range_km(self.gateway_elevation_deg, r_sat - R)) / C_KM_S
        return delay

    def access_time_s(self, range_km: float, elevation_deg: float) -> float:
        """Access on a target at this range and elevation: random access (4-step: two round
        trips) or RACH-less (one uplink), plus the processing."""
        return self.access_s + (4.0 if self.rach else 1.0) * self.one_way_s(range_km,
                                                                           elevation_deg)


@dataclass
class Plan:
    """When the handover's steps happen and how it ends."""

    t_cmd: float
    t_leave: float
    t_done: float
    outcome: str            # success | too-late | failure
    t_end: float            # when the outcome is known: t_done, the source's failure, or T304


def timeline(ps: ProcedureSettings, t_d: float, trigger: str, intra: bool,
             src: tuple[float, float], tgt: tuple[float, float], repoint_s: float,
             mbb: bool) -> tuple[float, float, float, float]:
    """(t_cmd, t_leave, access start, access complete) of a decision at ``t_d``; ``src`` and
    ``tgt`` are (range_km, elevation_deg) of the serving and target satellites.  Access starts
    once the antenna points at the target (a break-before-make one slews after leaving the
    source; a make-before-break one has slewed its free aperture since the decision)."""
    if ps.model == "instant":
        return t_d, t_d, t_d, t_d
    ow_src = ps.one_way_s(*src)
    if trigger in MEASUREMENT_TRIGGERS:
        t_cmd = t_d + ow_src + ps.decision_s + (0.0 if intra else ps.preparation_s) + ow_src
    else:                    # scheduled from ephemeris, or executed by the terminal (CHO)
        t_cmd = t_d
    t_leave = t_cmd + ps.rrc_s
    access = ps.access_time_s(*(tgt if math.isfinite(tgt[0]) else src))
    ready = t_leave if (mbb or intra) else t_leave + repoint_s
    if mbb and not intra:
        ready = max(t_leave, t_d + repoint_s)
    return t_cmd, t_leave, ready, ready + access
