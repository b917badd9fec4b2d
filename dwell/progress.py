"""Progress bars on stderr with rate and time left, for the long commands (run, passes, sweep,
bench).

One small interface over tqdm: a command opens a :class:`Progress` with a label and a unit and
hands its :meth:`Progress.to` (absolute position) to the work as a callback.  The bar is drawn
only when stderr is a terminal, so logs, pipes and tests see nothing.
"""

from __future__ import annotations

import sys
from typing import TextIO

from tqdm import tqdm


class Progress:
    """A progress bar: ``label``, position in ``unit`` (after multiplying by ``scale``), rate
    (in ``rate_unit`` if given) and estimated time left.  ``enabled=None`` means "when the
    stream is a terminal".

    Cheap: tqdm redraws at most about ten times a second whatever the update rate.
    """

    def __init__(self, label: str, unit: str, total: float | None = None, *, scale: float = 1.0,
                 decimals: int = 0, rate_unit: str | None = None, enabled: bool | None = None,
                 stream: TextIO | None = None):
        self.stream = sys.stderr if stream is None else stream
        self.enabled = _is_terminal(self.stream) if enabled is None else bool(enabled)
        # rate_unit: the singular for rates ("run/s", "s/case"); unit: the count's ("3/8 runs")
        self.label, self.unit, self.scale = label, rate_unit or unit, float(scale)
        count = f"{{n:.{decimals}f}}/{{total:.{decimals}f}} {unit}"
        self._format = ("{desc}: {percentage:3.0f}%|{bar}| " + count
                        + " [{elapsed} elapsed, {remaining} left, {rate_fmt}]{postfix}")
        self._bar: tqdm | None = None
        if total is not None:
            self._open(total)

    def _open(self, total: float) -> None:
        # opened once the total is known: the bar format needs it
        self._bar = tqdm(total=total * self.scale, desc=self.label, unit=self.unit,
                         file=self.stream, disable=not self.enabled, leave=True,
                         dynamic_ncols=True, mininterval=0.2, bar_format=self._format)

    def to(self, done: float, total: float | None = None, note: str | None = None) -> None:
        """Move the bar to ``done`` of ``total`` (both in the caller's units, scaled here)."""
        if not self.enabled:
            return
        if self._bar is None:
            if total is None:
                return
            self._open(total)
        elif total is not None and self._bar.total != total * self.scale:
            self._bar.total = total * self.scale
        if note is not None:
            self._bar.set_postfix_str(note, refresh=False)
        step = done * self.scale - self._bar.n
        if step > 0:
            self._bar.update(step)
        elif note is not None:
            self._bar.refresh()

    def write(self, message: str) -> None:
        """Print a line above the bar (or nothing when the bar is off)."""
        if self.enabled:
            tqdm.write(message, file=self.stream)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc) -> None:
        self.close()


def _is_terminal(stream: TextIO) -> bool:
    try:
        return bool(stream.isatty())
    except (AttributeError, ValueError):      # closed or replaced streams
        return False
