"""The `eddybox` command line.

Exit codes: 0 done; 2 usage or config error (one message naming the key or file); 3 numerical
instability (last good checkpoint kept); 75 stopped early by a signal or the wall-time budget
after a checkpoint (resume with --restart latest); 1 anything else.
"""
from __future__ import annotations

import argparse
import os
import sys

from eddybox.solver.errors import (
    EXIT_DONE,
    EXIT_ERROR,
    EXIT_STOPPED,
    EXIT_UNSTABLE,
    EXIT_USAGE,
    ConfigError,
)


class _Parser(argparse.ArgumentParser):
    def error(self, message):
        raise ConfigError(f"usage: {message} (see 'eddybox {self.prog.split()[-1]} --help')"
                          if " " in self.prog else f"usage: {message} (see 'eddybox --help')")


def _parser():
    p = _Parser(prog="eddybox", description="Forced isotropic turbulence with inertial particles "
                "and in-situ pair statistics.")
    sub = p.add_subparsers(dest="command", parser_class=_Parser)

    def with_config(sp):
        sp.add_argument("config", help="YAML config file")
        sp.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                        help="override a config key (value parsed as YAML); repeatable")

    r = sub.add_parser("run", help="run a config")
    with_config(r)
    r.add_argument("--out", help="output folder (default: the config's output)")
    r.add_argument("--restart", metavar="latest|FILE", help="continue from a checkpoint")
    r.add_argument("--overwrite", action="store_true", help="replace an existing output folder")
    r.add_argument("--quiet", action="store_true", help="no progress output on the terminal")

    c = sub.add_parser("check", help="validate a config and print derived scales and costs")
    with_config(c)

    d = sub.add_parser("demo", help="run the built-in demo end to end")
    d.add_argument("--out", default="runs/demo", help="output folder (default runs/demo)")
    d.add_argument("--overwrite", action="store_true", help="replace an existing demo folder")

    i = sub.add_parser("inspect", help="summarise an output file or run folder")
    i.add_argument("path")
    i.add_argument("--repair", action="store_true",
                   help="first make files left by a killed run readable by plain HDF5 readers")

    s = sub.add_parser("schema", help="print the JSON Schema of the config (for editors), or the "
                       "README's config reference with --markdown")
    s.add_argument("--markdown", action="store_true", help="the config reference as a Markdown table")

    b = sub.add_parser("bench", help="measure performance ratios on this machine")
    b.add_argument("--quick", action="store_true", help="smaller sizes, a few minutes")
    b.add_argument("--json", help="also write the figures to this JSON file")

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


def _add_report(sp):
    sp.add_argument("runs", nargs="+", metavar="RUN_DIR", help="run folders; the first is the reference")
    sp.add_argument("--out", required=True, help="folder for index.html, the PNGs and the CSV tables")
    sp.add_argument("--separation", type=float, default=1.0, metavar="R_ETA",
                    help="r/eta at which g and the collision kernel are drawn against St (default 1)")


def _add_estimate(sp):
    sp.add_argument("config", help="YAML config of the production run")
    sp.add_argument("--set", action="append", default=[], metavar="KEY=VALUE",
                    help="override a config key")
    sp.add_argument("--points", type=int, required=True, help="grid points per direction N")
    sp.add_argument("--ranks", type=int, required=True, help="MPI ranks P")
    sp.add_argument("--particles", type=int, default=None, help="particles in total")
    sp.add_argument("--network-bandwidth", type=float, default=None, help="bytes/s per rank")
    sp.add_argument("--network-latency", type=float, default=None, help="seconds per message")
    sp.add_argument("--calibration", default=None, help="JSON written by eddybox bench")


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


def cmd_run(args, comm=None):
    from eddybox.solver.errors import NumericalInstability, OutputWriteError
    from eddybox.solver.run import config as cfgmod
    from eddybox.solver.run.simulation import Simulation

    cfg = cfgmod.load(args.config, args.set)
    sim = Simulation(cfg, output=args.out, overwrite=args.overwrite, restart=args.restart, comm=comm,
                     quiet=args.quiet)
    try:
        return sim.run()
    except NumericalInstability as exc:
        if sim.is_root or comm is not None:
            print(f"eddybox: {exc}", file=sys.stderr, flush=True)
        if comm is not None and comm.Get_size() > 1:
            comm.Abort(EXIT_UNSTABLE)  # a particle check may fail on one rank only
        return EXIT_UNSTABLE
    except OutputWriteError as exc:
        print(f"eddybox: error: {exc}", file=sys.stderr, flush=True)
        if comm is not None and comm.Get_size() > 1:
            comm.Abort(EXIT_ERROR)  # only rank 0 writes: release the ranks waiting for it
        return EXIT_ERROR


def cmd_check(args, comm=None):
    from eddybox.solver.run import config as cfgmod
    from eddybox.solver.study.check import print_check

    cfg = cfgmod.load(args.config, args.set)
    print_check(cfg)
    return EXIT_DONE


def cmd_demo(args, comm=None):
    from eddybox.solver.study.demo import run_demo

    return run_demo(args.out, args.overwrite, comm=comm)


def cmd_inspect(args, comm=None):
    from eddybox.solver.study.inspect import inspect_path

    if args.repair:
        from eddybox.solver.run.repair import repair_path

        if not os.path.exists(args.path):
            raise ConfigError(f"{args.path}: no such file or folder")
        for f in repair_path(args.path):
            print(f"repaired {f} (its writer had been killed; every flushed sample kept)")
    print(inspect_path(args.path))
    return EXIT_DONE


def cmd_schema(args, comm=None):
    from eddybox.solver.run.config_docs import json_schema_text, reference_table

    print(reference_table() if args.markdown else json_schema_text())
    return EXIT_DONE


def cmd_bench(args, comm=None):
    from eddybox.solver.study.bench import run_bench

    return run_bench(quick=args.quick, json_path=args.json)


def cmd_sweep(args, comm=None):
    from eddybox.solver.study.sweep import run_sweep

    return run_sweep(args)


def cmd_report(args, comm=None):
    from eddybox.solver.study.report import write_report

    write_report(args.runs, args.out, args.separation)
    return EXIT_DONE


def cmd_estimate(args, comm=None):
    from eddybox.solver.study.estimate import print_estimate

    print_estimate(args)
    return EXIT_DONE


COMMANDS = {"run": cmd_run, "check": cmd_check, "demo": cmd_demo, "inspect": cmd_inspect,
            "schema": cmd_schema, "bench": cmd_bench, "sweep": cmd_sweep, "report": cmd_report,
            "estimate": cmd_estimate}


def _fail(comm, code, msg):
    rank = 0 if comm is None else comm.Get_rank()
    if rank == 0:
        print(f"eddybox: error: {msg}", file=sys.stderr)
    return code


def main(argv=None) -> int:
    comm = None
    try:
        args = _parser().parse_args(argv)
        if not args.command:
            raise ConfigError("usage: a command is required: " + ", ".join(COMMANDS)
                              + " (see 'eddybox --help')")
        if args.command in ("run", "demo"):
            comm = _comm()
        code = COMMANDS[args.command](args, comm)
    except ConfigError as exc:
        code = _fail(comm, EXIT_USAGE, str(exc))
    except KeyboardInterrupt:
        code = _fail(comm, EXIT_STOPPED, "interrupted")
    except BrokenPipeError:  # output piped into `head` and the like
        sys.stdout = open(os.devnull, "w")
        return EXIT_DONE
    except Exception as exc:  # noqa: BLE001 - the last line of defence: a message, not a trace
        from eddybox.solver.errors import CheckpointError, OutputError

        if isinstance(exc, (CheckpointError, OutputError)):
            code = _fail(comm, EXIT_USAGE, str(exc))
        else:
            if os.environ.get("EDDYBOX_DEBUG"):
                raise
            msg = f"{type(exc).__name__}: {exc} (set EDDYBOX_DEBUG=1 for a traceback)"
            if comm is not None and comm.Get_size() > 1:
                # an error on one rank only would leave the others waiting in a collective
                print(f"eddybox: error on rank {comm.Get_rank()}: {msg}", file=sys.stderr, flush=True)
                comm.Abort(EXIT_ERROR)
            code = _fail(comm, EXIT_ERROR, msg)
    sys.stdout.flush()
    return code


if __name__ == "__main__":
    sys.exit(main())
