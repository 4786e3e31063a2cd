"""The command line: ``swathmill run CONFIG``, ``status RUN_DIR``, ``demo [DIR]``, ``report RUN_DIR``.

Exit codes: 0 every tile of every step finished; 1 some tiles failed (listed; finished work kept);
2 bad input (configuration, files, a folder that is not a run directory); 3 the run directory is in
use by another process.

Python warnings (for example about ground-reference samples outside the mosaic) are printed as one
line each on the console and written to the run's log file (``logs/<invocation>.log``).
"""
from __future__ import annotations

import argparse
import json
import logging
import sys
import warnings
from pathlib import Path

from swathmill.errors import EXIT_FAILED, EXIT_INPUT, EXIT_OK, SwathmillError

__all__ = ["main", "WarningRelay"]

EPILOG = """\
exit codes: 0 finished; 1 some tiles failed (finished tiles are kept, run the same command again to
resume); 2 bad input; 3 the run directory is in use by another process.
"""


class WarningRelay(logging.Handler):
    """Python warnings as one clean line each: on the console, and in the run's log file.

    Installed as :func:`warnings.showwarning`. A warning raised before the run directory's log file is
    open (while the plan is built) is kept and written to the log as soon as the run logs its first
    message.
    """

    def __init__(self, stream=None):
        super().__init__(level=logging.DEBUG)
        self.stream = stream
        self.pending: list[logging.LogRecord] = []
        self.log = logging.getLogger("swathmill")

    @staticmethod
    def one_line(message: object, category: type | None = None) -> str:
        text = " ".join(str(message).split())
        kind = getattr(category, "__name__", "Warning")
        return text if kind in ("UserWarning", "Warning") else f"{text} ({kind})"

    def showwarning(self, message, category, filename, lineno, file=None, line=None) -> None:
        text = self.one_line(message, category)
        print(f"swathmill: warning: {text}", file=self.stream or sys.stderr, flush=True)
        record = self.log.makeRecord(self.log.name, logging.WARNING, filename, lineno, text, None, None)
        if self._files():
            for h in self._files():
                h.handle(record)
        else:
            self.pending.append(record)

    def _files(self) -> list[logging.Handler]:
        return [h for h in self.log.handlers if isinstance(h, logging.FileHandler)]

    def emit(self, record: logging.LogRecord) -> None:  # any run message: flush the early warnings
        files = self._files()
        if files and self.pending:
            early, self.pending = self.pending, []
            for r in early:
                for h in files:
                    h.handle(r)

    def __enter__(self) -> "WarningRelay":
        self._saved = warnings.showwarning
        warnings.showwarning = self.showwarning
        self.log.addHandler(self)
        return self

    def __exit__(self, *exc) -> None:
        warnings.showwarning = self._saved
        self.log.removeHandler(self)


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="swathmill", description=__doc__.splitlines()[0].replace("``", ""),
                                epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--version", action="store_true", help="print the version and exit")
    sub = p.add_subparsers(dest="command", metavar="COMMAND",
                           help="one of: run, plan, status, demo, report (swathmill COMMAND --help for its arguments)")

    r = sub.add_parser("run", help="run or resume the run a YAML configuration describes",
                       description="Run the steps a YAML configuration describes, or resume them: tiles already "
                                   "finished are kept, steps whose parameters or inputs changed are recomputed.",
                       epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    r.add_argument("config", type=Path, help="the run's YAML configuration file (see configs/example-campaign.yaml)")
    r.add_argument("--executor", choices=["local", "dask", "jobqueue"],
                   help="where tiles are computed, instead of the configuration's execution.executor: local (one "
                        "process), dask (worker processes on this machine or an existing scheduler), jobqueue "
                        "(workers submitted to a batch scheduler)")
    r.add_argument("--workers", type=int, help="number of Dask worker processes, instead of execution.workers")
    r.add_argument("--address", help="address of a running Dask scheduler to use (e.g. tcp://127.0.0.1:8786), "
                                     "instead of execution.address; implies --executor dask")
    r.add_argument("--no-disk-check", action="store_true",
                   help="run even when the plan's estimate of the disk space needed exceeds the free space (the "
                        "estimate errs on the safe side; see `swathmill plan --probe` for measured sizes)")
    r.add_argument("--plain", action="store_true",
                   help="print progress as plain lines (for logs and batch jobs) instead of progress bars")


    pl = sub.add_parser("plan", help="the cost of a run before running it: tiles, tasks, bytes, disk, memory, time",
                        description="Plan a run without running it: per step and for the run, tiles, tasks, passes "
                                    "over each store, bytes read and written, disk needed, peak memory per task and "
                                    "a time estimate. Nothing is written unless --probe or --save is given.")
    pl.add_argument("config", type=Path, help="the run's YAML configuration file")
    pl.add_argument("--json", action="store_true", help="print the plan as JSON instead of a table")
    pl.add_argument("--probe", action="store_true",
                    help="run a few tiles of each step (--probe-tiles, spread over the grid) in a scratch folder "
                         "inside the run directory (removed afterwards) to time them and measure compression "
                         "and memory")
    pl.add_argument("--probe-tiles", type=_at_least_one, default=4, metavar="N",
                    help="tiles the probe runs of each step (default 4): more tiles, a slower probe and a "
                         "closer estimate")
    pl.add_argument("--save", action="store_true",
                    help="keep the estimate in the run directory (estimate-plan.json): the report of the run "
                         "shows it beside the measured times and sizes")
    pl.add_argument("--executor", choices=["local", "dask", "jobqueue"],
                    help="the executor whose workers the estimate assumes, instead of execution.executor")
    pl.add_argument("--workers", type=int, help="number of workers the estimate assumes, instead of execution.workers")

    s = sub.add_parser("status", help="tiles done, pending and failed per step of a run directory",
                       description="Tiles done, pending and failed per step of a run directory, and the error "
                                   "of each failed tile. Exit code 0 when every step is finished, 1 otherwise, "
                                   "2 when the folder is not a run directory.")
    s.add_argument("run_dir", type=Path, help="the run directory (the configuration's run_dir)")
    s.add_argument("--json", action="store_true", help="print the status as JSON instead of a table")

    d = sub.add_parser("demo", help="write the invented demo scenario and its configuration into DIR, then run it",
                       description="Write an invented demo campaign (flight lines, spectral library, ground "
                                   "reference of the fictional site Corrowan Playa) and its configuration "
                                   "DIR/demo.yaml, then run it; the run directory is DIR/run.")
    d.add_argument("dir", type=Path, nargs="?", default=Path("swathmill-demo"),
                   help="folder to write the demo into (default: ./swathmill-demo)")
    d.add_argument("--size", choices=["small", "medium", "large"], default="small",
                   help="size of the invented scenes: small (a minute or two), medium, large (default: small)")
    d.add_argument("--seed", type=int, default=7, help="seed of the random scene generator (default: 7)")
    d.add_argument("--executor", choices=["local", "dask"], default=None,
                   help="local (one process) or dask (worker processes; the default)")
    d.add_argument("--plain", action="store_true", help="print progress as plain lines instead of progress bars")

    rp = sub.add_parser("report", help="rebuild the HTML report of a finished or partial run",
                        description="Rebuild RUN_DIR/report.html from what the run directory holds (a partial run "
                                    "gets a report of its finished steps). Exit code 2 when the folder is not a "
                                    "run directory.")
    rp.add_argument("run_dir", type=Path, help="the run directory (the configuration's run_dir)")
    return p


def _at_least_one(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number. Got {text!r}") from None
    if n < 1:
        raise argparse.ArgumentTypeError(f"must be at least 1. Got {n}")
    return n


def _not_a_run(run_dir: Path) -> str | None:
    """Why ``run_dir`` is not a run directory (None when it is one)."""
    run_dir = Path(run_dir)
    if not run_dir.exists():
        return f"{run_dir} does not exist"
    if not run_dir.is_dir():
        return f"{run_dir} is not a run directory (it is a file)"
    missing = [n for n in ("ledger.sqlite", "config.resolved.json") if not (run_dir / n).is_file()]
    if missing:
        return f"{run_dir} is not a run directory (no {' or '.join(missing)} in it)"
    return None


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    if args.version:
        from swathmill.tiles.run import ENGINE_VERSION
        print(f"swathmill {ENGINE_VERSION}")
        return EXIT_OK
    if args.command is None:
        _parser().print_help()
        return EXIT_INPUT
    with WarningRelay():
        return _command(args)


def _command(args: argparse.Namespace) -> int:
    from swathmill.workflows.app.pipeline import run_config
    try:
        if args.command == "run":
            return run_config(args.config, executor=args.executor, workers=args.workers, address=args.address,
                              plain=args.plain, disk_check=not args.no_disk_check)
        if args.command == "plan":
            from swathmill.workflows.app.pipeline import plan_config
            return plan_config(args.config, as_json=args.json, probe=args.probe, save=args.save,
                               probe_tiles=args.probe_tiles,
                               executor=args.executor, workers=args.workers)
        if args.command == "status":
            return _status(args.run_dir, args.json)
        if args.command == "demo":
            from swathmill.workflows.app.demo import run_demo
            return run_demo(args.dir, size=args.size, seed=args.seed, executor=args.executor, plain=args.plain)
        if args.command == "report":
            why = _not_a_run(args.run_dir)
            if why:
                print(f"swathmill: error: {why}", file=sys.stderr)
                return EXIT_INPUT
            from swathmill.workflows.app.pipeline import rebuild_report
            path = rebuild_report(args.run_dir)
            print(f"report: {path}")
            return EXIT_OK
    except SwathmillError as exc:  # every error of ours carries its exit code (swathmill.errors)
        print(f"swathmill: error: {exc}", file=sys.stderr)
        return exc.exit_code
    return EXIT_INPUT


def _status(run_dir: Path, as_json: bool) -> int:
    from swathmill.tiles.run import run_status

    why = _not_a_run(run_dir)
    if why:
        print(f"swathmill: error: {why}", file=sys.stderr)
        return EXIT_INPUT
    from swathmill.tiles.incremental import campaign_history, campaign_notes

    rows = run_status(run_dir)
    if as_json:
        print(json.dumps({"run_dir": str(Path(run_dir).resolve()), "steps": rows,
                          "campaign": campaign_history(run_dir)}, indent=2))
    else:
        from rich.console import Console
        from rich.table import Table

        t = Table(title=f"run {Path(run_dir).resolve()}")
        for c in ("step", "tiles", "done", "pending", "failed"):
            t.add_column(c, justify="left" if c == "step" else "right")
        for r in rows:
            t.add_row(r["step"], str(r["total"]), str(r["done"]), str(r["pending"]), str(r["failed"]))
        con = Console()
        con.print(t)
        for r in rows:
            for tile, err in r["errors"].items():
                con.print(f"  {r['step']} tile ({tile}): {err}", highlight=False, markup=False)
        for note in campaign_notes(run_dir):
            con.print(note, highlight=False, markup=False)
    incomplete = any(r["pending"] or r["failed"] for r in rows)
    return EXIT_FAILED if incomplete else EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
