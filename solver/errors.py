"""The exceptions of eddybox and the exit codes of its command line, in one module at the
bottom of the import graph: every package may raise them, none has to import another to do so.

Exit codes (the CLI contract): 0 done; 2 usage or config error (one message naming the key or
file; nothing written or removed); 3 numerical instability (last good checkpoint kept); 75
stopped early by a signal or the wall-time budget with a checkpoint to resume from (resume with
--restart latest); 76 stopped by a signal before any checkpoint existed (nothing to resume);
1 anything else (a failed write names the last good checkpoint).
"""

EXIT_DONE, EXIT_ERROR, EXIT_USAGE, EXIT_UNSTABLE, EXIT_STOPPED = 0, 1, 2, 3, 75
EXIT_NOTHING_TO_RESUME = 76


class ConfigError(Exception):
    """Invalid configuration or command line; the message names the key or file."""


class InitialFieldError(ValueError):
    """An initial-field file that cannot be used (the message says what was found)."""


class NumericalInstability(Exception):
    """The state became non-finite or the CFL number left the stable range."""


class OutputError(Exception):
    """A file that cannot be written or read as expected (message names the file)."""


class OutputWriteError(Exception):
    """An output or checkpoint file could not be written; the last checkpoint is intact."""


class CheckpointError(Exception):
    """A checkpoint that cannot be used (message names the file and why)."""


class DiskWriteError(OSError):
    """Writing an output file failed (disk full, permissions, a vanished folder). h5py reports
    such failures as RuntimeError as well as OSError; both become this, naming the file."""


class StopRequested(BaseException):
    """SIGTERM, SIGINT or SIGUSR1 before the time loop runs (see `eddybox.solver.run.stops`).
    A BaseException, so that no `except Exception` on the way swallows it."""

    def __init__(self, signal_name: str):
        super().__init__(signal_name)
        self.signal_name = signal_name
