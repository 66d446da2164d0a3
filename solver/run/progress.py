"""The run log (log.txt plus the terminal) and the progress line."""
from __future__ import annotations

import datetime
import sys
import time


class RunLog:
    """The run log. With `hold`, lines are kept until `attach` gives the file (the output
    folder is taken only after every check has passed), then written with their own times."""

    def __init__(self, path, quiet=False, stream=None, hold=False):
        self.fh = open(path, "a") if path else None
        self.held = [] if hold and not path else None
        self.quiet = quiet
        self.stream = stream or sys.stdout
        self.tty = (not quiet) and hasattr(self.stream, "isatty") and self.stream.isatty()
        self._live = False

    def attach(self, path):
        """Open the log file and write (and show) the lines held so far."""
        self.fh = open(path, "a")
        held, self.held = self.held or [], None
        for stamp, msg in held:
            self.fh.write(f"{stamp} {msg}\n")
            self._show(msg)
        self.fh.flush()

    def write(self, msg: str):
        stamp = datetime.datetime.now().strftime("%Y-%m-%d %H:%M:%S")
        if self.held is not None:  # a refused run shows nothing but its one-line refusal
            self.held.append((stamp, msg))
            return
        if self.fh:
            self.fh.write(f"{stamp} {msg}\n")
            self.fh.flush()
        self._show(msg)

    def _show(self, msg: str):
        if not self.quiet:
            if self._live:
                self.stream.write("\n")
                self._live = False
            self.stream.write(msg + "\n")
            self.stream.flush()

    def live(self, msg: str):
        """Rewrite the current terminal line (only on a terminal)."""
        if self.tty:
            self.stream.write("\r" + msg[:160].ljust(100))
            self.stream.flush()
            self._live = True

    def close(self):
        if self._live:
            self.stream.write("\n")
            self._live = False
        if self.fh:
            fh, self.fh = self.fh, None
            fh.close()


class Progress:
    """A live line on a terminal (~5 per second), a plain line every `batch_every` seconds in
    a batch log: step, t, dt, E, eps, Re_lambda, kmax eta and the estimated time left."""

    def __init__(self, log: RunLog, t_end: float, sim, batch_every: float = 10.0):
        self.log, self.t_end, self.sim = log, t_end, sim
        self.every = 0.2 if log.tty else batch_every
        self.t_wall0 = time.monotonic()
        self.t_sim0 = sim.t
        self.last = self.t_wall0

    def line(self) -> str:
        s = self.sim
        sp = s.spectral_stats()
        e, eps = sp["energy"], sp["dissipation"]
        from eddybox.solver.fluid.fluid_stats import derived_scales

        d = derived_scales(e, eps, sp["inv_k"], s.nu, s.nl.kmax())
        wall = time.monotonic() - self.t_wall0
        rate = (s.t - self.t_sim0) / wall if wall > 0 else 0.0
        eta = (self.t_end - s.t) / rate if rate > 0 else float("nan")
        return (f"step {s.step:7d}  t {s.t:9.4f}  dt {s.dt:.3e}  E {e:.4e}  eps {eps:.4e}  "
                f"Re_lambda {d['re_lambda']:6.1f}  kmax_eta {d['kmax_eta']:5.2f}  ETA {_fmt(eta)}")

    def update(self):
        now = time.monotonic()
        due = now - self.last >= self.every
        if self.sim.layout.size > 1:
            due = self.sim.layout.bcast(due)  # the line needs a reduction: all ranks or none
        elif self.log.quiet:
            return
        if not due:
            return
        self.last = now
        msg = self.line()
        if self.log.quiet:
            return
        if self.log.tty:
            self.log.live(msg)
        else:
            self.log.write(msg)

    def close(self):
        if self.log.tty and self.log._live:
            self.log.stream.write("\n")
            self.log._live = False


def _fmt(seconds: float) -> str:
    if seconds != seconds or seconds == float("inf"):
        return "--:--:--"
    seconds = int(seconds)
    return f"{seconds // 3600:02d}:{seconds % 3600 // 60:02d}:{seconds % 60:02d}"
