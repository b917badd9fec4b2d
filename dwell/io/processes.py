"""Worker processes that end with their parent and whose death is reported, not fatal.

:func:`each_in_a_process` runs ``fn(job)`` for every job in a forked process of its own, at
most ``workers`` at a time, and yields each job's outcome as it ends.  A worker that dies (the
out-of-memory killer's SIGKILL, a crash in a library) yields a failure naming the signal
instead of breaking the others, unlike a process pool (whose pool then breaks as a whole).

Workers stop with their parent: on Linux each one asks the kernel for SIGKILL when its parent
dies (``prctl(PR_SET_PDEATHSIG)``, see the prctl(2) manual page), so a parent killed with
``kill -9`` leaves no worker computing or writing; a parent stopped by SIGTERM or Ctrl-C kills
its workers itself (:func:`stop_on_signals`).  Workers ignore SIGINT: Ctrl-C reaches the
whole process group, and only the parent should act on it.

Cost: one fork per job (milliseconds; jobs here are whole runs or terminal groups).
"""

from __future__ import annotations

import ctypes
import multiprocessing as mp
import os
import signal
import sys
import traceback
from dataclasses import dataclass
from multiprocessing.connection import wait
from typing import Any, Callable, Iterator

PR_SET_PDEATHSIG = 1          # from <linux/prctl.h>


def die_with_parent(parent_pid: int) -> None:
    """Ask for SIGKILL when the parent dies (Linux); exit now if it is already gone."""
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
        except (OSError, AttributeError):    # no prctl: the parent's handlers still apply
            pass
    if os.getppid() != parent_pid:           # the parent died before the request took hold
        os._exit(1)


def worker_setup(parent_pid: int) -> None:
    """What every worker does first: die with the parent, leave Ctrl-C to the parent."""
    die_with_parent(parent_pid)
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    for sig in (signal.SIGTERM, signal.SIGHUP):     # not the parent's unwinding handlers
        signal.signal(sig, signal.SIG_DFL)


class Stopped(SystemExit):
    """The process got SIGTERM (or SIGHUP): unwinds like an exit, so cleanup runs."""


def stop_on_signals() -> None:
    """Turn SIGTERM and SIGHUP into :class:`Stopped` in this (parent) process, so that
    ``finally`` blocks kill the workers and remove temporary files before it ends."""
    def handler(signum, frame):
        raise Stopped(128 + signum)
    for sig in (signal.SIGTERM, signal.SIGHUP):
        signal.signal(sig, handler)


@dataclass
class Outcome:
    """How one job ended: ``ok`` with ``value`` (fn's result), or not, with ``error`` (the
    exception fn raised, re-raisable) or ``died`` (why the process ended without a result)."""

    index: int
    ok: bool
    value: Any = None
    error: BaseException | None = None
    died: str = ""


def death_reason(exitcode: int | None) -> str:
    """Plain words for a worker that ended without handing back a result."""
    if exitcode is not None and exitcode < 0:
        name = signal.Signals(-exitcode).name if -exitcode in signal.valid_signals() else \
            f"signal {-exitcode}"
        hint = " (the system's out-of-memory killer sends SIGKILL)" if \
            -exitcode == signal.SIGKILL else ""
        return f"its worker process was killed by {name}{hint}"
    return f"its worker process exited with status {exitcode} before handing back a result"


def _child(fn: Callable[[Any], Any], job: Any, conn, parent_pid: int) -> None:
    worker_setup(parent_pid)
    try:
        result = (True, fn(job))
    except BaseException as exc:      # handed to the parent, which decides
        from .errors import InputError
        if not isinstance(exc, InputError):      # a bug: keep where it happened
            exc.add_note("in a worker process:\n" + traceback.format_exc().rstrip())
        result = (False, exc)
    try:
        conn.send(result)
    except Exception as exc:          # an unpicklable result or error: say what it was
        conn.send((False, RuntimeError(f"{type(result[1]).__name__}: {result[1]}"
                                       if not result[0] else f"unpicklable result ({exc})")))
    conn.close()


@dataclass
class _Active:
    index: int
    proc: Any
    conn: Any
    outcome: Outcome | None = None
    read: bool = False            # the result (or the end of the pipe) has been read


def each_in_a_process(fn: Callable[[Any], Any], jobs: list[Any], workers: int,
                      tick: Callable[[], None] | None = None) -> Iterator[Outcome]:
    """Yield an :class:`Outcome` per job as it ends (not in job order).

    Jobs are forked from this process (they inherit its memory: large read-only inputs cost
    nothing to hand over); results come back pickled.  Leaving the iterator early (an
    exception, a signal) kills the workers still running.  ``tick`` is called about twice a
    second while jobs run (a progress display).
    """
    ctx = mp.get_context("fork")
    todo = list(enumerate(jobs))[::-1]
    active: dict[Any, _Active] = {}
    me = os.getpid()
    try:
        while todo or active:
            while todo and len(active) < max(1, workers):
                index, job = todo.pop()
                recv, send = ctx.Pipe(duplex=False)
                proc = ctx.Process(target=_child, args=(fn, job, send, me), daemon=True)
                proc.start()
                send.close()
                active[proc.sentinel] = _Active(index, proc, recv)
            by_conn = {a.conn: a for a in active.values() if not a.read}
            ready = wait(list(by_conn) + list(active), timeout=None if tick is None else 0.5)
            if tick is not None:
                tick()
            for obj in ready:                # results first: a result precedes its exit
                a = by_conn.get(obj)
                if a is not None:
                    a.outcome, a.read = _receive(a), True
            for obj in ready:
                a = active.get(obj)
                if a is None:
                    continue
                if not a.read and a.conn.poll(0):
                    a.outcome, a.read = _receive(a), True
                a.proc.join()
                del active[obj]
                a.conn.close()
                yield a.outcome if a.outcome is not None else Outcome(
                    a.index, False, died=death_reason(a.proc.exitcode))
    finally:
        for a in active.values():
            if a.proc.is_alive():
                a.proc.kill()
            a.proc.join()
            a.conn.close()


def _receive(a: _Active) -> Outcome | None:
    try:
        ok, value = a.conn.recv()
    except (EOFError, OSError):
        return None                  # died while sending: reported by its exit status
    return Outcome(a.index, True, value) if ok else Outcome(a.index, False, error=value)
