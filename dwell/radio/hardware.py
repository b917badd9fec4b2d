"""Terminal antenna hardware: how many apertures, how they steer, what a switch costs.

Keys of the ``[[terminal]]`` table added here (a contract):

- ``apertures`` (1): with two or more, handovers are make-before-break;
- ``steering`` ("electronic"): "mechanical" apertures pay slew time = angle / ``slew_rate_deg_s``
  plus ``settle_s``; electronic ones a fixed ``retune_s``;
- ``interruption_s``: the break of a break-before-make handover before re-pointing is added,
  and of every change between beams or cells of one satellite (nothing re-points there, and a
  second aperture does not help);
- ``mbb_interruption_s``: the (usually zero) break of a make-before-break handover to another
  satellite.

Default values are illustrative, not measured: set them from the terminal's data sheet.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from ..io.errors import InputError
from ..io.schema import between, ge, gt, integer, number, text

TERMINAL_KEYS = {
    "apertures": integer(1, ge(1), doc="independently pointed apertures (2+ allows make-before-break)"),
    "steering": text("electronic", choices=("electronic", "mechanical"), doc="how apertures re-point"),
    "slew_rate_deg_s": number(10.0, gt(0), doc="mechanical slew rate"),
    "settle_s": number(0.0, ge(0), doc="mechanical settling time after a slew"),
    "retune_s": number(0.001, ge(0), doc="electronic re-pointing time"),
    "interruption_s": number(0.05, between(0, 10), doc="break of a break-before-make handover"),
    "mbb_interruption_s": number(0.0, between(0, 10), doc="break of a make-before-break handover"),
}


def check_terminal(params: dict[str, Any], source: str, where: str) -> None:
    if params["mbb_interruption_s"] > params["interruption_s"] and params["apertures"] > 1:
        raise InputError(source, f"{where}.mbb_interruption_s", params["mbb_interruption_s"],
                         "a make-before-break break longer than interruption_s makes no sense")


@dataclass(frozen=True)
class Hardware:
    apertures: int
    mechanical: bool
    slew_rate_deg_s: float
    settle_s: float
    retune_s: float
    interruption_s: float
    mbb_interruption_s: float

    @classmethod
    def from_terminal(cls, params: dict[str, Any]) -> "Hardware":
        return cls(int(params["apertures"]), params["steering"] == "mechanical",
                   float(params["slew_rate_deg_s"]), float(params["settle_s"]),
                   float(params["retune_s"]), float(params["interruption_s"]),
                   float(params["mbb_interruption_s"]))

    @property
    def make_before_break(self) -> bool:
        return self.apertures >= 2

    def repoint_s(self, slew_angle_deg):
        """Time to point an aperture through ``slew_angle_deg`` (array or float)."""
        if self.mechanical:
            return slew_angle_deg / self.slew_rate_deg_s + self.settle_s
        return 0.0 * slew_angle_deg + self.retune_s
