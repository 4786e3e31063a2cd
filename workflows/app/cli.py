"""The command line: ``swathmill run CONFIG``, ``status RUN_DIR``, ``demo [DIR]``, ``report RUN_DIR``.

Exit codes: 0 every tile of every step finished; 1 some tiles failed (listed; finished work kept);
2 bad input (configuration, files); 3 the run directory is in use by another process.
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from swathmill.errors import EXIT_FAILED, EXIT_INPUT, EXIT_OK, SwathmillError

__all__ = ["main"]



def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="swathmill", description=__doc__.splitlines()[0])
    p.add_argument("--version", action="store_true", help="print the version and exit")
    sub = p.add_subparsers(dest="command")
    r = sub.add_parser("run", help="run or resume the run a YAML configuration describes")
    r.add_argument("config", type=Path)
    r.add_argument("--executor", choices=["local", "dask", "jobqueue"], help="override execution.executor")
    r.add_argument("--workers", type=int, help="override execution.workers")
    r.add_argument("--address", help="override execution.address (an existing Dask scheduler)")
    r.add_argument("--plain", action="store_true", help="plain progress lines instead of bars")
    s = sub.add_parser("status", help="tiles done, pending and failed per step of a run directory")
    s.add_argument("run_dir", type=Path)
    s.add_argument("--json", action="store_true", help="machine-readable output")
    d = sub.add_parser("demo", help="write the invented demo scenario and its configuration into DIR, then run it")
    d.add_argument("dir", type=Path, nargs="?", default=Path("swathmill-demo"))
    d.add_argument("--size", choices=["small", "medium", "large"], default="small")
    d.add_argument("--seed", type=int, default=7)
    d.add_argument("--executor", choices=["local", "dask"], default=None)
    d.add_argument("--plain", action="store_true")
    rp = sub.add_parser("report", help="rebuild the HTML report of a finished or partial run")
    rp.add_argument("run_dir", type=Path)
    return p


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    if args.version:
        from swathmill.tiles.run import ENGINE_VERSION
        print(f"swathmill {ENGINE_VERSION}")
        return EXIT_OK
    if args.command is None:
        _parser().print_help()
        return EXIT_INPUT
    from swathmill.workflows.app.pipeline import run_config
    try:
        if args.command == "run":
            return run_config(args.config, executor=args.executor, workers=args.workers, address=args.address,
                              plain=args.plain)
        if args.command == "status":
            return _status(args.run_dir, args.json)
        if args.command == "demo":
            from swathmill.workflows.app.demo import run_demo
            return run_demo(args.dir, size=args.size, seed=args.seed, executor=args.executor, plain=args.plain)
        if args.command == "report":
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

    if not (Path(run_dir) / "ledger.sqlite").is_file():
        print(f"swathmill: error: {run_dir} is not a run directory (no ledger.sqlite)", file=sys.stderr)
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
                con.print(f"  {r['step']} tile ({tile}): {err}", highlight=False)
        for note in campaign_notes(run_dir):
            con.print(note, highlight=False)
    incomplete = any(r["pending"] or r["failed"] for r in rows)
    return EXIT_FAILED if incomplete else EXIT_OK


if __name__ == "__main__":
    sys.exit(main())
