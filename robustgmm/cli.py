"""The ``robustgmm`` command line: argument parsing, exit codes, one-line errors
(the text it shows is built in :mod:`robustgmm.terminal`).

Subcommands: ``fit``, ``audit``, ``report``, ``demo``, ``bench``. Exit codes (design
contract): 0 done; 2 bad input or a model that cannot be estimated (each problem on
its own ``robustgmm: error:`` line on stderr, no traceback); 1 internal error (one
line; the traceback only with ``ROBUSTGMM_DEBUG=1``); 3 an audit run with
``--fail-on-fragile`` found a fragile focus term; 130 interrupted.

The estimation, audit, report, demo and bench modules are imported inside their
subcommand, so that ``robustgmm --help`` and the input checks stay fast.
"""
from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import sys
import traceback
import warnings
from pathlib import Path
from typing import Sequence

from . import __version__
from .errors import DataWarning, EstimationError, InputError
from .paths import (STDOUT, cannot_write, check_audit_inputs, check_json_path, check_model_path,
                    check_name_length, check_output_folder)
from .terminal import (audit_summary, format_fit_summary, fragile_terms, nothing_varied_note,
                       plan_counts_line, plan_table, run_line, run_notes, simulation_summary)

EXIT_OK, EXIT_INTERNAL, EXIT_INPUT, EXIT_FRAGILE, EXIT_INTERRUPTED = 0, 1, 2, 3, 130
EXIT_TERMINATED = 143  # 128 + SIGTERM, as shells report it
DEBUG_ENV = "ROBUSTGMM_DEBUG"
#: The estimation's memory budget in MB (read by the core; checked here first).
MEMORY_ENV = "ROBUSTGMM_MEMORY_MB"


# ---------------------------------------------------------------------------
# argument parsing
# ---------------------------------------------------------------------------
class _UsageError(Exception):
    """A command-line problem found by argparse (reported as one line, exit 2)."""


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse would print usage and exit; we want one line
        raise _UsageError(f"{message} (see '{self.prog} --help')")


def _jobs(text: str) -> int:
    """--jobs: a positive whole number, or -1 for every core (argparse adds the
    "argument --jobs:" prefix to the message)."""
    message = f"must be a positive whole number, or -1 for every core (got {text!r})"
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(message) from None
    if value == 0 or value < -1:
        raise argparse.ArgumentTypeError(message)
    return value


def _whole(text: str) -> int:
    """--reps, --seed, --simulate: a whole number (the range is checked with the
    other inputs, by robustgmm.montecarlo.replicate.check_reps)."""
    try:
        return int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"must be a whole number (got {text!r})") from None


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="robustgmm",
                     description="Audit how robust a dynamic panel GMM result is.")
    parser.add_argument("--version", action="version", version=f"robustgmm {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("fit", help="estimate the model of a model file and print a summary")
    p.add_argument("model", metavar="MODEL.toml", help="model file")
    p.add_argument("--json", metavar="OUT.json",
                   help="also write the results as JSON ('-': only the JSON, on standard output)")
    p.add_argument("--all-terms", action="store_true",
                   help="also list the period dummies in the summary")

    p = sub.add_parser("audit", help="estimate every variant of a model and judge robustness")
    p.add_argument("model", metavar="MODEL.toml", help="model file with an [audit] section")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="output folder (required, except with --plan, which writes nothing)")
    p.add_argument("--jobs", type=_jobs, default=None, metavar="N",
                   help="parallel workers at most (-1 = every core, the default); they "
                        "start only when the estimated work repays their start-up")
    add_start_workers_option(p)
    p.add_argument("--plan", action="store_true",
                   help="list the variants and their instrument counts without estimating")
    p.add_argument("--no-cache", action="store_true", help="do not reuse or keep cached variants")
    p.add_argument("--yes", action="store_true",
                   help=f"run (or plan) a grid of more than {LARGE_GRID:,} variants")
    p.add_argument("--fail-on-fragile", action="store_true",
                   help="exit with code 3 when a focus term is fragile")
    p.add_argument("--force", action="store_true",
                   help="write into an existing non-empty folder that robustgmm did not create")
    add_scheduler_option(p)

    p.add_argument("--simulate", type=_whole, default=None, metavar="R",
                   help="also run R replications of the whole grid in a world calibrated to "
                        "the data (simulation.csv, calibration.json)")
    p.add_argument("--seed", type=_whole, default=0, metavar="S",
                   help="seed of the simulation (default 0)")

    p = sub.add_parser("simulate", help="how every variant behaves at this sample size: the "
                       "grid on panels simulated to look like the data")
    p.add_argument("model", metavar="MODEL.toml", help="model file")
    p.add_argument("--out", metavar="DIR", required=True, help="output folder")
    p.add_argument("--reps", type=_whole, default=200, metavar="R",
                   help="replications (default 200, at least 10)")
    p.add_argument("--seed", type=_whole, default=0, metavar="S", help="seed (default 0)")
    p.add_argument("--jobs", type=_jobs, default=None, metavar="N",
                   help="parallel workers at most (-1 = every core, the default); they "
                        "start only when the estimated work repays their start-up")
    add_start_workers_option(p)
    p.add_argument("--initial", choices=("stationary", "data"), default=None,
                   help="initial conditions: stationary (default) or the data's first-period "
                        "deviations from the unit means (wins over [simulate] initial)")
    p.add_argument("--no-cache", action="store_true",
                   help="do not reuse or keep cached replications")
    p.add_argument("--yes", action="store_true",
                   help=f"run a grid of more than {LARGE_GRID:,} variants")
    p.set_defaults(plan=False)
    p.add_argument("--force", action="store_true",
                   help="write into an existing non-empty folder that robustgmm did not create")
    add_scheduler_option(p)

    p = sub.add_parser("report", help="rebuild the report of an audit output folder")
    p.add_argument("dir", metavar="DIR", help="an audit output folder")

    p = sub.add_parser("demo", help="run an audit on an invented scenario with known truth")
    p.add_argument("--out", metavar="DIR", default="reports/demo",
                   help="output folder (default: reports/demo, the committed example output)")
    p.add_argument("--jobs", type=_jobs, default=None, metavar="N", help="parallel workers")
    p.add_argument("--force", action="store_true",
                   help="write into an existing non-empty folder that robustgmm did not create")

    p = sub.add_parser("bench", help="measure speed on simulated workloads")
    p.add_argument("--quick", action="store_true", help="small workloads only")
    p.add_argument("--out", metavar="DIR", default=None, help="where to write the bench report")
    p.add_argument("--workloads", metavar="LIST", default=None,
                   help="only these workloads, by number, comma-separated (e.g. 5,8); "
                        "needs --out, so reports/bench.md stays a full run")
    return parser


def add_scheduler_option(p) -> None:
    """``--scheduler`` of the commands that run many estimations (audit, simulate;
    another such command adds this option and opens :func:`cluster_backend`)."""
    p.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="run the estimations on the dask.distributed cluster of this "
                        "scheduler (tcp://HOST:PORT; default: the DASK_SCHEDULER_ADDRESS "
                        "environment variable, then [run] scheduler in the model file)")


@contextlib.contextmanager
def cluster_backend(args, model: Path):
    """The joblib backend name for a run: "dask" (connected to the scheduler named by
    ``--scheduler``, ``DASK_SCHEDULER_ADDRESS`` or ``[run] scheduler``, in that order)
    or None (local workers). Unreachable schedulers, missing workers and other
    package versions on the workers are one-line input errors (exit 2)."""
    from .audit import cluster
    from .modelfile import read_run
    target = cluster.resolve(getattr(args, "scheduler", None), read_run(model).scheduler,
                             str(model))
    if target is None:
        yield None
        return
    address, where = target
    with cluster.connect(address, where):
        yield "dask"


def add_start_workers_option(p) -> None:
    p.add_argument("--start-workers", action="store_true",
                   help="start the --jobs worker processes even when the work looks too "
                        "small to repay them (for measuring and testing)")


def say(line: str) -> None:
    """One line of information on stderr (where the work runs, ...)."""
    print(f"robustgmm: {line}", file=sys.stderr, flush=True)


# ---------------------------------------------------------------------------
# subcommands
# ---------------------------------------------------------------------------
def _out(text: str = "") -> None:
    print(text, file=sys.stdout, flush=True)


def cmd_fit(args) -> int:
    from .data import load_panel
    from .modelfile import read_model

    model = check_model_path(args.model)
    if args.json:
        check_json_path(args.json)  # the cheap checks before estimating
    spec = read_model(model)
    json_path = (check_json_path(args.json, (("model file", model), ("data file", spec.data_file)))
                 if args.json else None)
    panel = load_panel(spec)
    from .core import fit
    try:
        result = fit(spec, panel)
    except EstimationError as exc:
        raise EstimationError(f"{spec.source}: cannot estimate the model: {exc}") from None
    if args.json == STDOUT:  # the JSON alone on standard output, for a pipe
        from .atomic import to_json_text
        sys.stdout.write(to_json_text(result.to_dict()))
        sys.stdout.flush()
        return EXIT_OK
    _out(format_fit_summary(spec, panel, result, all_terms=args.all_terms))
    if json_path is not None:
        from .atomic import atomic_write_json
        try:
            atomic_write_json(json_path, result.to_dict())
        except OSError as exc:
            raise InputError(f"{args.json}: cannot write the JSON file "
                             f"({exc.strerror or type(exc).__name__})") from None
        _out(f"\nWrote {json_path}")
    return EXIT_OK


def _plan_frame(spec):
    from .audit.grid import plan_frame
    return plan_frame(spec)


#: Above this many variants an audit (or its plan) asks for ``--yes``: a grid that
#: size takes hours and is usually a mistake in [audit.vary] (common practice: a
#: referee's list of variants is tens to a few hundred).
LARGE_GRID = 5000


def check_grid_size(spec, args) -> None:
    """Refuse a very large grid without ``--yes``: one line with the count and, for an
    audit, the time it would take (one base-model fit timed, times the variants,
    over the workers). Counting the grid estimates nothing. A model file with
    ``[audit] max_variants`` sets its own cap instead (above it: an error naming the
    key, whatever ``--yes`` says)."""
    from .audit.grid import check_size
    n = check_size(spec, cap=LARGE_GRID)
    if spec.max_variants is not None or n is None or n <= LARGE_GRID or args.yes:
        return
    what = "planning it counts instruments for each" if args.plan else "running it"
    estimate = "" if args.plan else _time_estimate(spec, n, args.jobs)
    raise InputError(f"{spec.source}: [audit.vary] makes {n:,} variants (more than "
                     f"{LARGE_GRID:,}){estimate}; {what} is a long job: add --yes to go "
                     "ahead (or set [audit] max_variants), or vary fewer settings")


def _time_estimate(spec, n: int, jobs) -> str:
    import time as _time
    import joblib
    from .core import fit
    from .data import load_panel
    try:
        panel = load_panel(spec)
        t0 = _time.perf_counter()
        fit(spec, panel)
        seconds = (_time.perf_counter() - t0) * n / max(joblib.effective_n_jobs(jobs or -1), 1)
    except (InputError, EstimationError):
        return ""
    hours = seconds / 3600
    return (f", about {hours:.1f} hours" if hours >= 1 else f", about {seconds / 60:.0f} minutes")


def cmd_audit(args) -> int:
    from .modelfile import read_model

    if args.out is None and not args.plan:
        raise _UsageError("the following arguments are required: --out "
                          "(the output folder; only --plan runs without one)")
    if not args.plan:
        check_name_length(args.out, "--out")
    spec = read_model(check_model_path(args.model))
    check_grid_size(spec, args)
    if args.simulate is not None and not args.plan:
        from .montecarlo.replicate import check_reps
        check_reps(args.simulate, args.seed)
    if args.plan:
        if spec.vary.is_empty():
            print(nothing_varied_note(spec), file=sys.stderr, flush=True)
        frame = _plan_frame(spec)
        _out(plan_table(frame))
        counts = plan_counts_line(frame)
        if counts is not None:
            _out(counts)
        return EXIT_OK
    check_audit_inputs(Path(args.out), spec, Path(args.model))
    with contextlib.ExitStack() as stack:
        # the cluster first: an unreachable scheduler leaves no output folder behind
        backend = stack.enter_context(cluster_backend(args, Path(args.model)))
        out = check_output_folder(args.out, args.force)
        if spec.vary.is_empty():
            print(nothing_varied_note(spec), file=sys.stderr, flush=True)
        result = _run_audit(spec, out, args, backend)
    return _after_audit(result, out, args)


def _run_audit(spec, out: Path, args, backend):
    from .audit import audit as run_audit, write_audit
    from .output import FolderLock

    with FolderLock(out, "audit"):  # one audit per folder, for the whole run
        kw = {} if backend is None else {"backend": backend}
        result = run_audit(spec, jobs=args.jobs, start_workers=args.start_workers, notify=say,
                           cache_dir=None if args.no_cache else out / ".cache",
                           progress=sys.stderr.isatty(), **kw,
                           **({} if args.simulate is None else
                              {"simulate": args.simulate, "seed": args.seed,
                               "simulate_options": _simulate_options(args.model)}))
        try:
            write_audit(result, out, model_file=Path(args.model), report=_report_builder())
        except OSError as exc:
            raise cannot_write(args.out, exc) from None
    return result


def _simulate_options(model) -> dict:
    """The model file's ``[simulate]`` settings as keyword arguments of the simulation."""
    from .modelfile import read_simulate
    return read_simulate(Path(model)).options()


def _after_audit(result, out: Path, args) -> int:
    run = (getattr(result, "manifest", None) or {}).get("run", {})
    for note in run_notes(run):
        print(note, file=sys.stderr)
    fragile = fragile_terms(result.verdict)
    _out(audit_summary(result.verdict, out, fragile))
    _out(run_line(run, result.variants["status"]))
    if args.fail_on_fragile and fragile:
        return EXIT_FRAGILE
    return EXIT_OK


def cmd_simulate(args) -> int:
    from .modelfile import read_model, read_simulate
    from .montecarlo.replicate import check_reps, simulate, write_simulation
    from .output import FolderLock

    check_name_length(args.out, "--out")
    spec = read_model(check_model_path(args.model))
    check_reps(args.reps, args.seed)
    check_grid_size(spec, args)
    check_audit_inputs(Path(args.out), spec, Path(args.model))
    with contextlib.ExitStack() as stack:
        # the cluster first: an unreachable scheduler leaves no output folder behind
        backend = stack.enter_context(cluster_backend(args, Path(args.model)))
        out = check_output_folder(args.out, args.force)
        stack.enter_context(FolderLock(out, "simulate"))
        world = read_simulate(Path(args.model)).options()  # [simulate]
        if args.initial is not None:
            world["initial"] = args.initial
        sim = simulate(spec, reps=args.reps, seed=args.seed, jobs=args.jobs,
                       start_workers=args.start_workers, notify=say,
                       cache_dir=None if args.no_cache else out / ".cache",
                       progress=sys.stderr.isatty(), backend=backend, **world)
        try:
            write_simulation(sim, out, model_file=Path(args.model))
        except OSError as exc:
            raise cannot_write(args.out, exc) from None
    _out(simulation_summary(sim, out))
    return EXIT_OK


def _report_builder():
    """The report builder for :func:`write_audit` (None, with a note, when the report
    module cannot be imported)."""
    try:
        from .report import build_report
    except ImportError:
        print("robustgmm: note: the report module is not available; wrote the data files only",
              file=sys.stderr)
        return None
    return build_report


def cmd_report(args) -> int:
    check_name_length(args.dir, "DIR")
    folder = Path(args.dir)
    if not folder.is_dir():
        raise InputError(f"{args.dir}: no such folder")
    if not (folder / "manifest.json").is_file():
        raise InputError(f"{args.dir}: no audit here (manifest.json missing); "
                         "run 'robustgmm audit MODEL.toml --out DIR' first")
    from .output import AUDIT_DATA_FILES, FolderLock, recorded_files, remove_stale, write_record
    from .report import build_report
    with FolderLock(folder, "report"):
        try:
            written = [str(Path(p).relative_to(folder)) for p in build_report(folder)]
            old = recorded_files(folder)
            # the audit's files (the Monte Carlo's too) stay; old documents not
            # written again go
            remove_stale(folder, [f for f in old if f not in AUDIT_DATA_FILES], written)
            write_record(folder, [*(f for f in old if f in AUDIT_DATA_FILES), *written])
        except OSError as exc:  # a read-only folder, a full disk
            raise cannot_write(args.dir, exc) from None
    _out(f"Wrote the report in {folder}")
    return EXIT_OK


def cmd_demo(args) -> int:
    out = check_output_folder(args.out, args.force)
    from .demo import run_demo
    try:
        run_demo(out, jobs=args.jobs)
    except OSError as exc:
        raise cannot_write(args.out, exc) from None
    verdict = json.loads((out / "verdict.json").read_text(encoding="utf-8"))
    _out(audit_summary(verdict, out, fragile_terms(verdict)))
    _out(f"Open {out / 'report.html'} for the report; the true values of the invented "
         f"world are in {out / 'truth.json'}")
    return EXIT_OK


def cmd_bench(args) -> int:
    out = None
    if args.out is not None:
        out = Path(args.out)
        if out.exists() and not out.is_dir():
            raise InputError(f"{args.out}: --out must be a folder; this is a file")
    from .bench import WORKLOADS, run
    only = None
    if args.workloads is not None:
        if out is None:
            raise InputError("--workloads: give --out as well (reports/bench.md holds only "
                             "full runs)")
        only = []
        for part in args.workloads.split(","):
            part = part.strip()
            if not part.isdigit() or not 1 <= int(part) <= len(WORKLOADS):
                raise InputError(f"--workloads: {part!r} is not a workload number "
                                 f"(1 to {len(WORKLOADS)})")
            only.append(int(part))
    run(quick=args.quick, out_dir=out, only=only)
    return EXIT_OK


COMMANDS = {"fit": cmd_fit, "audit": cmd_audit, "simulate": cmd_simulate, "report": cmd_report,
            "demo": cmd_demo, "bench": cmd_bench}
#: the commands that estimate: their process keeps freed memory for the next
#: estimation (robustgmm.allocator); ``report`` estimates nothing
ESTIMATING = frozenset({"fit", "audit", "simulate", "demo", "bench"})


# ---------------------------------------------------------------------------
# entry point
# ---------------------------------------------------------------------------
def _error(line: str) -> None:
    # one problem, one line: a stray line break inside a message must not split it
    line = " ".join(str(line).splitlines())
    print(f"robustgmm: error: {line}", file=sys.stderr, flush=True)


def _show_warning(message, category, filename, lineno, file=None, line=None,
                  _default=warnings.showwarning):
    """Data warnings as one ``robustgmm: warning:`` line each; others as Python shows them."""
    if issubclass(category, DataWarning):
        text = " ".join(str(message).split())
        print(f"robustgmm: warning: {text}", file=sys.stderr, flush=True)
    else:
        _default(message, category, filename, lineno, file, line)


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit code (the console script exits with it)."""
    argv = list(sys.argv[1:] if argv is None else argv)
    with warnings.catch_warnings(), _terminate_like_interrupt():
        warnings.simplefilter("always", DataWarning)
        warnings.showwarning = _show_warning
        return _main(argv)


class _Terminated(KeyboardInterrupt):
    """SIGTERM, handled like Ctrl-C (finished variants are already in the cache)."""


@contextlib.contextmanager
def _terminate_like_interrupt():
    """SIGTERM raises :class:`_Terminated` in the main thread, so a terminated audit
    stops its workers, removes its temporary files and prints one line, as Ctrl-C
    does. Only in the main thread (signal handlers cannot be set elsewhere)."""
    import signal
    import threading
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def handler(signum, frame):
        raise _Terminated()
    previous = signal.signal(signal.SIGTERM, handler)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, previous)


def check_environment() -> None:
    """Settings read from the environment, checked before any work (one line each)."""
    value = os.environ.get(MEMORY_ENV)
    if value in (None, ""):
        return
    try:
        number = float(value)
    except ValueError:
        number = math.nan
    if not (math.isfinite(number) and number > 0):
        raise InputError(f"{MEMORY_ENV} = {value!r}: must be a positive number of megabytes "
                         "(the memory budget of one estimation, e.g. 1024)")


def _main(argv: list[str]) -> int:
    try:
        try:
            args = build_parser().parse_args(argv)
        except SystemExit as exc:  # --help / --version
            return int(exc.code or 0) if not isinstance(exc.code, str) else EXIT_INPUT
        check_environment()
        if args.command in ESTIMATING:
            from .allocator import keep_freed_memory
            keep_freed_memory()
        return COMMANDS[args.command](args)
    except _UsageError as exc:
        _error(str(exc))
        return EXIT_INPUT
    except InputError as exc:
        for line in exc.problems:
            _error(line)
        return EXIT_INPUT
    except EstimationError as exc:
        for line in str(exc).splitlines() or ["the model cannot be estimated"]:
            _error(line)
        return EXIT_INPUT
    except _Terminated:
        print("robustgmm: terminated (SIGTERM); finished variants are kept in the cache "
              "and a rerun resumes", file=sys.stderr, flush=True)
        return EXIT_TERMINATED
    except KeyboardInterrupt:
        print("robustgmm: interrupted", file=sys.stderr, flush=True)
        return EXIT_INTERRUPTED
    except BrokenPipeError:
        # the reader closed the pipe (``robustgmm fit m.toml | head``): stop quietly;
        # point stdout at /dev/null so the interpreter's final flush does not fail
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        except (OSError, ValueError):
            pass
        return EXIT_OK
    except Exception as exc:  # anything else is our bug: one line, traceback on request
        if os.environ.get(DEBUG_ENV):
            traceback.print_exc()
        text = " ".join(str(exc).split()) or type(exc).__name__
        print(f"robustgmm: internal error: {type(exc).__name__}: {text} "
              f"(set {DEBUG_ENV}=1 to see the traceback)", file=sys.stderr, flush=True)
        return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
