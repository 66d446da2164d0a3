"""The `eddybox` command line.

Exit codes: 0 done; 2 usage or config error (one message naming the key or file; nothing
written or removed); 3 numerical instability (last good checkpoint kept); 75 stopped early by a
signal or the wall-time budget with a checkpoint to resume from (resume with --restart latest);
76 stopped by a signal before there was a checkpoint (nothing to resume); 1 anything else.

SIGTERM, SIGINT and SIGUSR1 are caught before anything heavy is imported
(`eddybox.solver.run.stops`): only the standard library, `eddybox.solver.errors` and
`eddybox.solver.run.stops` are imported at module level here.
"""
from __future__ import annotations

import os
import sys

from eddybox.solver.run import stops

if __name__ == "__main__" or os.path.basename(sys.argv[0]) == "eddybox":
    stops.install("hold")  # the process is eddybox: catch stop signals from the first line on

import argparse  # noqa: E402
import time  # noqa: E402

from eddybox.solver.errors import (  # noqa: E402
    EXIT_DONE,
    EXIT_ERROR,
    EXIT_NOTHING_TO_RESUME,
    EXIT_STOPPED,
    EXIT_UNSTABLE,
    EXIT_USAGE,
    ConfigError,
    StopRequested,
)


MAX_MEMORY_HELP = ("memory one machine may use, e.g. 256GiB (default: this machine's memory); a "
                   "run needing more is refused before it starts")


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        raise ConfigError(f"usage: {message} (see 'eddybox {self.prog.split()[-1]} --help')"
                          if " " in self.prog else f"usage: {message} (see 'eddybox --help')")


def _parser():
    p = _Parser(prog="eddybox", description="Forced isotropic turbulence with inertial particles "
                "and in-situ pair statistics.")
    from eddybox.solver import __version__

    p.add_argument("--version", action="version", version=f"eddybox {__version__}")
    sub = p.add_subparsers(dest="command", parser_class=_Parser)

    def with_config(sp):
        sp.add_argument("config", help="YAML config file")
        sp.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                        help="override a config key (value parsed as YAML); repeatable")

    r = sub.add_parser("run", help="run a config, or continue a run folder")
    r.add_argument("config", nargs="?", help="YAML config file (leave out to continue the run "
                   "folder given by --out with --restart latest: its config.yaml is used)")
    r.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                   help="override a config key (value parsed as YAML); repeatable; on a restart "
                        "only the keys that may change may differ from the run's")
    r.add_argument("--out", help="output folder (default: the config's output)")
    r.add_argument("--restart", metavar="latest|FILE", help="continue from a checkpoint")
    r.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    r.add_argument("--quiet", action="store_true", help="no progress output on the terminal")
    r.add_argument("--max-memory", metavar="SIZE", help=MAX_MEMORY_HELP)

    c = sub.add_parser("check", help="validate a config and print derived scales and costs")
    with_config(c)
    c.add_argument("--max-memory", metavar="SIZE", help=MAX_MEMORY_HELP)

    d = sub.add_parser("demo", help="run the built-in demo end to end")
    d.add_argument("--out", default="runs/demo", help="output folder (default runs/demo)")
    d.add_argument("--overwrite", action="store_true", help="replace an existing demo folder")

    i = sub.add_parser("inspect", help="summarise an output file or run folder")
    i.add_argument("path")
    i.add_argument("--datasets", action="store_true",
                   help="list every dataset of a checkpoint, not only its summary")
    i.add_argument("--repair", action="store_true",
                   help="first make files left by a killed run readable by plain HDF5 readers")

    s = sub.add_parser("schema", help="print the JSON Schema of the config (for editors), or the "
                       "README's config reference with --markdown")
    s.add_argument("--markdown", action="store_true", help="the config reference as a Markdown table")
    s.add_argument("--write-readme", metavar="README", help="replace the config reference between "
                   "the marker lines of this README (for contributors)")

    b = sub.add_parser("bench", help="measure performance ratios on this machine")
    b.add_argument("--quick", action="store_true", help="smaller sizes, a few minutes")
    b.add_argument("--json", help="also write the figures to this JSON file")
    b.add_argument("--section", action="append", default=None, metavar="NAME",
                   help="run only this section (repeatable): fluid, resolution, particles, "
                        "pairs, collisions, scaling, estimate")

    for name, mod in _EXTRA.items():
        mod_parser = sub.add_parser(name, help=mod[0])
        mod[1](mod_parser)
    return p


def _add_sweep(sp):
    sp.add_argument("config", help="YAML config file shared by every run")
    sp.add_argument("--vary", action="append", default=[], metavar="KEY=V1,V2,...", required=True,
                    help="values of one key (YAML, comma separated); repeat for every combination")
    sp.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="override a key in every run")
    sp.add_argument("--jobs", type=int, default=None,
                    help="runs at once (default: as many as fit the cores)")
    sp.add_argument("--out", default=None, help="parent folder of the runs (default: the config's output)")
    sp.add_argument("--reference", action="append", default=[], metavar="KEY=VALUE",
                    help="a reference run, the config with these overrides (repeatable), run "
                         "first in DIR/reference; the other runs' 'x T_E' values resolve from its "
                         "measured stationary T_E = L/u'")
    sp.add_argument("--match", action="append", default=[], metavar="QUANTITY",
                    help="give every other run the reference's measured stationary value: "
                         "dissipation (forcing.dissipation)")
    _add_correction(sp)


#: the names of eddybox.solver.estimators.significance.CORRECTIONS (not imported here: the
#: parser is built before anything heavy is imported)
CORRECTION_NAMES = ("holm", "bh", "none")


def _add_correction(sp):
    sp.add_argument("--correction", default="holm", choices=CORRECTION_NAMES,
                    help="correction of the significance tests for the number of comparisons: "
                         "holm (Holm 1979, the chance of any false flag; default), bh (Benjamini "
                         "& Hochberg 1995, the expected fraction of false flags) or none")


def _add_report(sp):
    sp.add_argument("runs", nargs="+", metavar="RUN_DIR", help="run folders; the first is the reference")
    sp.add_argument("--out", default=None, help="folder for index.html, the PNGs and the CSV files "
                    "(default: RUN_DIR/report for one run, else a folder report/ beside the runs)")
    sp.add_argument("--separation", type=float, default=1.0, metavar="R_ETA",
                    help="r/eta at which g and the collision kernel are drawn and compared "
                         "against St (default 1)")
    _add_correction(sp)


def _add_estimate(sp):
    sp.add_argument("config", help="YAML config of the production run")
    sp.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="override a config key")
    sp.add_argument("--points", type=int, default=None, help="grid points per direction N")
    sp.add_argument("--kmax-eta", type=float, default=None,
                    help="alone: compare the dealiasing options at this k_max eta and pick the "
                         "cheapest N; with --points or --re-lambda: the viscosity (or N) that "
                         "holds it")
    sp.add_argument("--re-lambda", type=float, default=None,
                    help="choose the viscosity for this Re_lambda at the forcing's dissipation; "
                         "N follows from --points, or from k_max eta (--kmax-eta, default the "
                         "config's own)")
    sp.add_argument("--ranks", type=int, required=True, help="MPI ranks P")
    sp.add_argument("--particles", type=_count, default=None,
                    help="particles in total (an integer; 1e7 is accepted)")
    sp.add_argument("--network-bandwidth", type=float, default=None, help="bytes/s per rank")
    sp.add_argument("--network-latency", type=float, default=None, help="seconds per message")
    sp.add_argument("--calibration", default=None, help="JSON written by eddybox bench")
    j = sp.add_argument_group("batch job script (the restart chain of the production run)")
    j.add_argument("--job-script", metavar="FILE", help="write a batch script for the run here")
    j.add_argument("--scheduler", default="slurm", help="slurm (default) or pbs")
    j.add_argument("--cores-per-node", type=int, default=48, help="cores of one node (default 48)")
    j.add_argument("--margin", type=float, default=0.25,
                   help="extra wall time over the estimate, as a fraction (default 0.25)")
    j.add_argument("--max-walltime", default="24:00:00",
                   help="the queue's longest job, HH:MM:SS (default 24:00:00); the chain resumes "
                        "what one job cannot finish")
    j.add_argument("--job-walltime", default=None, help="each job's limit, HH:MM:SS, instead of "
                   "the one from the estimate")
    j.add_argument("--out", default=None, help="the run folder the job writes (default: the "
                   "config's output)")


def _count(text) -> int:
    """An integer count, also written as 1e7."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}") from None
    if not value.is_integer():
        raise argparse.ArgumentTypeError(f"expected an integer, got {text!r}")
    return int(value)


_EXTRA = {"sweep": ("one run per combination of varied keys", _add_sweep),
          "report": ("side-by-side comparison of runs (HTML, PNG, CSV)", _add_report),
          "estimate": ("projected memory, time per step and core-hours", _add_estimate)}


def _comm():
    """MPI communicator when launched under mpiexec with more than one rank, else None."""
    if not any(k in os.environ for k in ("PMI_RANK", "OMPI_COMM_WORLD_RANK", "PMI_SIZE",
                                         "PMIX_RANK", "MPI_LOCALNRANKS")):
        return None
    try:
        from mpi4py import MPI
    except ImportError:
        return None
    return MPI.COMM_WORLD if MPI.COMM_WORLD.Get_size() > 1 else None


def _max_memory(args):
    from eddybox.solver.run.inventory import parse_size

    return None if getattr(args, "max_memory", None) is None else parse_size(args.max_memory)


def _one_line(comm, text):
    """Print `text` on stderr from rank 0 only (every rank reaches the same verdict)."""
    if comm is None or comm.Get_rank() == 0:
        print(f"eddybox: {' '.join(str(text).split())}", file=sys.stderr, flush=True)


def cmd_run(args, comm=None):
    from eddybox.solver.errors import NumericalInstability, OutputWriteError
    from eddybox.solver.run import config as cfgmod
    from eddybox.solver.run.simulation import Simulation

    limit = _max_memory(args)
    if args.config is None:
        if args.restart is None or not args.out:
            raise ConfigError("usage: run needs a CONFIG file, or a run folder to continue with "
                              "--out RUN_DIR --restart latest")
        args.config = os.path.join(args.out, "config.yaml")
        if not os.path.isfile(args.config):
            raise ConfigError(f"--out {args.out}: no config.yaml; not a run folder to continue")
    cfg = cfgmod.load(args.config, args.set)
    out = str(args.out or cfg.output)
    sim = None
    try:
        sim = Simulation(cfg, output=out, overwrite=args.overwrite, restart=args.restart, comm=comm,
                         quiet=args.quiet, max_memory=limit, started=args.started)
        return sim.run()
    except StopRequested as stop:
        return _stopped(comm, stop, args, out)
    except NumericalInstability as exc:
        if sim is None or sim.is_root or comm is not None:
            print(f"eddybox: {exc}", file=sys.stderr, flush=True)
        if comm is not None and comm.Get_size() > 1:
            comm.Abort(EXIT_UNSTABLE)  # a particle check may fail on one rank only
        return EXIT_UNSTABLE
    except OutputWriteError as exc:
        if sim is None:  # failed while creating the files: every rank knows it
            _one_line(comm, f"error: {exc}")
            return EXIT_ERROR
        print(f"eddybox: error: {exc}", file=sys.stderr, flush=True)
        if comm is not None and comm.Get_size() > 1:
            comm.Abort(EXIT_ERROR)  # only rank 0 writes: release the ranks waiting for it
        return EXIT_ERROR
    finally:
        if sim is not None:
            sim.close()


def _stopped(comm, stop, args, out):
    """A stop signal before the time loop: 75 when this run has a checkpoint to resume from (a
    restart), 76 when it has none."""
    import glob

    from eddybox.solver.run.run_folder import holds_run

    command = f"eddybox run {args.config} --out {out}"
    resumable = args.restart is not None and \
        bool(glob.glob(os.path.join(out, "checkpoints", "checkpoint_*.h5")))
    if resumable:
        msg = (f"stopped by {stop.signal_name} before the run continued; resume with: "
               f"eddybox run --out {out} --restart latest")
    else:
        again = " --overwrite" if os.path.isdir(out) and holds_run(out) else ""
        msg = (f"stopped by {stop.signal_name} before the first checkpoint: nothing to resume; "
               f"start again with: {command}{again}")
    _one_line(comm, msg)
    return EXIT_STOPPED if resumable else EXIT_NOTHING_TO_RESUME


def cmd_check(args, comm=None):
    from eddybox.solver.run import config as cfgmod
    from eddybox.solver.run.inventory import check_memory
    from eddybox.solver.study.check import print_check

    limit = _max_memory(args)
    cfg = cfgmod.load(args.config, args.set)
    check_memory(cfg, limit)
    print_check(cfg)
    return EXIT_DONE


def cmd_demo(args, comm=None):
    from eddybox.solver.study.demo import run_demo

    return run_demo(args.out, args.overwrite, comm=comm)


def cmd_inspect(args, comm=None):
    from eddybox.solver.study.inspect import inspect_path

    if args.repair:
        from eddybox.solver.run.repair import repair_path
        from eddybox.solver.run.run_folder import folder_of, refuse_if_locked

        if not os.path.exists(args.path):
            raise ConfigError(f"{args.path}: no such file or folder")
        refuse_if_locked(args.path if os.path.isdir(args.path) else folder_of(args.path),
                         "inspect --repair")
        for f in repair_path(args.path):
            print(f"repaired {f} (its writer had been killed; every flushed sample kept)")
    print(inspect_path(args.path, args.datasets))
    return EXIT_DONE


def cmd_schema(args, comm=None):
    from eddybox.solver.run.config_docs import json_schema_text, reference_table, update_readme

    if args.write_readme:
        changed = update_readme(args.write_readme)
        print(f"{args.write_readme}: config reference {'updated' if changed else 'already current'}")
        return EXIT_DONE
    print(reference_table() if args.markdown else json_schema_text())
    return EXIT_DONE


def cmd_bench(args, comm=None):
    from eddybox.solver.study.bench import run_bench

    from eddybox.solver.study.bench import BENCHES

    unknown = [s for s in args.section or () if s not in BENCHES]
    if unknown:
        raise ConfigError(f"--section: {unknown[0]!r} is not a bench section; choose from "
                          + ", ".join(BENCHES))
    return run_bench(quick=args.quick, json_path=args.json, sections=args.section)


def cmd_sweep(args, comm=None):
    from eddybox.solver.study.sweep import run_sweep

    return run_sweep(args)


def cmd_report(args, comm=None):
    from eddybox.solver.study.report import default_report_folder, write_report

    index = write_report(args.runs, args.out or default_report_folder(args.runs), args.separation,
                         args.correction)
    print(f"report written to {index}")
    return EXIT_DONE


def cmd_estimate(args, comm=None):
    from eddybox.solver.study.estimate import print_estimate, print_resolution_options

    if args.kmax_eta is not None and args.points is None and args.re_lambda is None:
        print_resolution_options(args)
    else:
        print_estimate(args)
    return EXIT_DONE


COMMANDS = {"run": cmd_run, "check": cmd_check, "demo": cmd_demo, "inspect": cmd_inspect,
            "schema": cmd_schema, "bench": cmd_bench, "sweep": cmd_sweep, "report": cmd_report,
            "estimate": cmd_estimate}


def _fail(comm, code, msg):
    stops.settle()
    rank = 0 if comm is None else comm.Get_rank()
    if rank == 0:
        print(f"eddybox: error: {' '.join(str(msg).split())}", file=sys.stderr)
    return code


def main(argv=None) -> int:
    """Run one command; return its exit code. Called with `argv` (from Python, tests), the
    signal handlers it installs are put back on return; as the process's entry point they stay
    until the process ends, so no signal after the last line kills it."""
    started = time.monotonic()
    stops.install("hold")
    previous_hook = sys.unraisablehook
    sys.unraisablehook = _quiet_h5py_cleanup
    comm = None
    code = EXIT_ERROR
    try:
        try:
            args = _parser().parse_args(argv)
            args.started = started
            if args.command not in ("run", "demo"):  # (a run checks between its start-up steps)
                stops.install("raise")  # short commands stop at once
                stops.check()
            if not args.command:
                raise ConfigError("usage: a command is required: " + ", ".join(COMMANDS)
                                  + " (see 'eddybox --help')")
            if args.command in ("run", "demo"):
                comm = _comm()
            code = COMMANDS[args.command](args, comm)
            stops.settle()
        except ConfigError as exc:
            code = _fail(comm, EXIT_USAGE, str(exc))
        except (StopRequested, KeyboardInterrupt) as exc:
            stops.settle()
            _one_line(comm, f"stopped by {getattr(exc, 'signal_name', 'SIGINT')} before it "
                      "could finish; nothing to resume")
            code = EXIT_NOTHING_TO_RESUME
            if comm is not None and comm.Get_size() > 1:
                comm.Abort(code)  # other ranks may wait in a collective
        except BrokenPipeError:  # output piped into `head` and the like
            sys.stdout = open(os.devnull, "w")
            return EXIT_DONE
        except Exception as exc:  # noqa: BLE001 - the last line of defence: a message, not a trace
            from eddybox.solver.errors import CheckpointError, DiskWriteError, OutputError

            if isinstance(exc, (CheckpointError, OutputError)):
                code = _fail(comm, EXIT_USAGE, str(exc))
            elif isinstance(exc, DiskWriteError):
                code = _fail(comm, EXIT_ERROR, f"writing failed: {exc}")
            else:
                if os.environ.get("EDDYBOX_DEBUG"):
                    raise
                msg = f"{type(exc).__name__}: {exc} (set EDDYBOX_DEBUG=1 for a traceback)"
                if comm is not None and comm.Get_size() > 1:
                    # an error on one rank only would leave the others waiting in a collective
                    print(f"eddybox: error on rank {comm.Get_rank()}: {msg}", file=sys.stderr, flush=True)
                    comm.Abort(EXIT_ERROR)
                code = _fail(comm, EXIT_ERROR, msg)
        try:
            sys.stdout.flush()
        except BrokenPipeError:
            pass
        return code
    except StopRequested as exc:  # the signal came while a failure was being reported
        stops.settle()
        print(f"eddybox: stopped by {exc.signal_name}", file=sys.stderr, flush=True)
        code = EXIT_NOTHING_TO_RESUME
        return code
    finally:
        sys.unraisablehook = previous_hook
        if argv is not None:
            stops.uninstall()
        else:
            stops.ignore_from_now()
            output = sys.modules.get("eddybox.solver.run.output")
            if output is not None and output.abandoned():
                # an HDF5 file could not be closed after a failed write: leave without the
                # interpreter's clean-up, which would try to close it (see output._ABANDONED)
                sys.stdout.flush()
                sys.stderr.flush()
                os._exit(code)


def _quiet_h5py_cleanup(unraisable):
    """After a failed write, h5py's clean-up of that file's objects reports the same failure
    again as 'Exception ignored' tracebacks; the failure was reported once already."""
    if isinstance(unraisable.exc_value, (OSError, RuntimeError)) and \
            "h5py" in repr(unraisable.object):
        return
    sys.__unraisablehook__(unraisable)


if __name__ == "__main__":
    sys.exit(main())
