"""One error type for bad user input, so the CLI can print one line and exit with status 2."""

from __future__ import annotations


class InputError(Exception):
    """Bad user input: names the file, the key (or line) and the offending value.

    ``str(err)`` is the one line the CLI prints, e.g.
    ``demo.toml: constellation[1].altitude_km = -5: must be > 0``.
    """

    def __init__(self, source: str, where: str | None, value: object = None, reason: str = "",
                 show_value: bool = True):
        self.source = str(source)
        self.where = where
        self.value = value
        self.reason = reason
        self.show_value = show_value
        # the arguments themselves, so that ``type(err)(*err.args)`` (simpy re-raising a
        # process's error) and pickling (worker processes) rebuild the same error
        super().__init__(self.source, where, value, reason, show_value)

    def __str__(self) -> str:
        return self._line()

    def _line(self) -> str:
        head = _one_line(self.source)
        if self.where:
            head += f": {_one_line(str(self.where))}"
            if self.show_value:
                head += f" = {_short(self.value)}"
        return f"{head}: {_one_line(self.reason)}" if self.reason else head


def _one_line(text: str) -> str:
    """Control characters (a key named with a newline, say) shown escaped: one line always."""
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def _short(value: object, limit: int = 60) -> str:
    text = repr(value)
    text = text.replace("\n", "\\n")
    return text if len(text) <= limit else text[: limit - 3] + "..."


class RunFailed(Exception):
    """A run could not complete for a reason that is not bad input (a worker process died);
    the message is one line, and nothing was written."""
