"""Stopping at any moment: SIGTERM, SIGINT and SIGUSR1 end eddybox with a documented exit code
and one line, never a traceback or a death by signal.

The command line installs the handlers first thing (`install`), before numpy, h5py, numba or
pyFFTW are imported. The handler records the first signal; what happens next depends on the
mode:

    raise   short commands (inspect, report, ...): the first signal raises `StopRequested`
            at once; later ones, arriving while that unwinds (a burst), are only recorded
    hold    a run's start-up: the signal is recorded, and `check()`, called between the
            phases of the start-up, raises `StopRequested`. (Raising at once could land inside
            a library's clean-up code, which swallows it and prints a traceback.)
    poll    the time loop: the loop asks `received()` after each step, writes a checkpoint
            and exits 75

When eddybox is the process, `ignore_from_now()` makes the stop signals harmless while the
interpreter shuts down (Python puts the default handlers back then, and a burst of signals
would otherwise end the process by signal after its last line was written).

This module imports only the standard library and `eddybox.solver.errors`.
"""
from __future__ import annotations

import signal

from eddybox.solver.errors import StopRequested

SIGNALS = tuple(getattr(signal, name) for name in ("SIGTERM", "SIGINT", "SIGUSR1")
                if hasattr(signal, name))


class _State:
    installed = False
    mode = "raise"
    received = None      # name of the first signal of this invocation
    raised = False       # StopRequested already raised for it
    previous: dict = {}


_S = _State()


def _handler(signum, frame):
    if _S.received is None:
        _S.received = signal.Signals(signum).name
    if _S.mode == "raise" and not _S.raised:
        _S.raised = True
        raise StopRequested(_S.received)


def install(mode: str = "raise") -> bool:
    """Catch the stop signals; False when not possible (not the main thread). A signal
    already recorded by an earlier `install` in this process is kept."""
    if not _S.installed:
        previous = {}
        try:
            for s in SIGNALS:
                previous[s] = signal.signal(s, _handler)
        except ValueError:  # not in the main thread: leave the handlers alone
            for s, h in previous.items():
                signal.signal(s, h)
            return False
        _S.previous = previous
        _S.installed = True
        _S.received, _S.raised = None, False
    _S.mode = mode
    return True


def uninstall():
    """Put back the handlers found by `install` (for in-process callers such as tests)."""
    if _S.installed:
        for s, h in _S.previous.items():
            signal.signal(s, h)
    _S.installed = False
    _S.previous = {}
    _S.received, _S.raised, _S.mode = None, False, "raise"


def ignore_from_now():
    """The process is about to exit: ignore the stop signals from here on."""
    for s in SIGNALS:
        try:
            signal.signal(s, signal.SIG_IGN)
        except ValueError:  # pragma: no cover - not the main thread
            pass
    _S.installed = False


def received():
    """The name of the first stop signal of this invocation, or None."""
    return _S.received


def hold():
    """From now on a signal is recorded and raised by `check()` (a run's start-up)."""
    if _S.installed:
        _S.mode = "hold"


def check(name=None):
    """Raise StopRequested when a stop signal has arrived (between start-up phases); `name`:
    a signal another MPI rank received."""
    name = _S.received or name
    if name is not None and not _S.raised and _S.mode != "poll":
        _S.raised = True
        raise StopRequested(name)


def start_polling() -> bool:
    """From now on a signal is only recorded: the time loop asks `received()` after each step.
    Installs the handlers when the command line has not (a Simulation used from Python);
    returns True then, so that the caller uninstalls them at the end."""
    if _S.installed:
        _S.mode = "poll"
        return False
    ok = install("poll")
    return ok


def settle():
    """The command has ended (or is reporting its failure): later signals are only recorded."""
    if _S.installed:
        _S.mode = "poll"
