"""Progress display: rich bars on a terminal (tiles done of total, rate, ETA), plain lines elsewhere.

A phase with nothing to go over (a model fitted from its configuration alone) shows nothing.
"""
from __future__ import annotations

import sys
import time

__all__ = ["make_progress"]


class PlainProgress:
    """One line when a step starts, every ~10% and at its end; for logs and CI."""

    def __init__(self, stream=None):
        self.stream = stream or sys.stdout
        self.state: dict[str, list] = {}

    def _p(self, text: str) -> None:
        print(text, file=self.stream, flush=True)

    def start(self, step, total, done, phase="tiles"):
        self.state[step] = [total, done, time.perf_counter(), phase, done]
        if total == 0:  # a phase with nothing to go over (a model fitted from its configuration alone)
            return
        self._p(f"[{step}] {phase}: {done}/{total} already done" if done else f"[{step}] {phase}: {total} to do")

    def advance(self, step, n=1):
        st = self.state[step]
        st[1] += n
        total, done, t0, phase, start_done = st
        step10 = max(1, total // 10)
        if done % step10 == 0 or done == total:
            rate = (done - start_done) / max(time.perf_counter() - t0, 1e-9)
            eta = (total - done) / rate if rate > 0 else float("nan")
            self._p(f"[{step}] {phase}: {done}/{total} ({rate:.1f}/s, ETA {eta:.0f}s)")

    def end(self, step):
        st = self.state.pop(step, None)
        if st and st[0]:
            self._p(f"[{step}] {st[3]}: finished in {time.perf_counter() - st[2]:.1f}s")

    def message(self, text):
        self._p(text)

    def close(self):
        pass


class RichProgress:
    def __init__(self):
        from rich.console import Console
        from rich.progress import (BarColumn, MofNCompleteColumn, Progress, TaskProgressColumn, TextColumn,
                                   TimeElapsedColumn, TimeRemainingColumn)

        self.console = Console()
        self.bar = Progress(TextColumn("[bold]{task.description}"), BarColumn(), MofNCompleteColumn(),
                            TaskProgressColumn(), TextColumn("{task.fields[rate]}"), TimeElapsedColumn(),
                            TimeRemainingColumn(), console=self.console)
        self.bar.start()
        self.tasks: dict[str, tuple[int, float, int]] = {}

    def start(self, step, total, done, phase="tiles"):
        if total == 0:
            return
        tid = self.bar.add_task(f"{step} {phase}", total=total, completed=done, rate="")
        self.tasks[step] = (tid, time.perf_counter(), done)

    def advance(self, step, n=1):
        if step not in self.tasks:
            return
        tid, t0, d0 = self.tasks[step]
        self.bar.advance(tid, n)
        done = self.bar.tasks[[t.id for t in self.bar.tasks].index(tid)].completed
        self.bar.update(tid, rate=f"{(done - d0) / max(time.perf_counter() - t0, 1e-9):.1f} tiles/s")

    def end(self, step):
        self.tasks.pop(step, None)

    def message(self, text):
        self.console.print(text, highlight=False, markup=False)

    def close(self):
        self.bar.stop()


def make_progress(force_plain: bool = False):
    if not force_plain and sys.stdout.isatty():
        return RichProgress()
    return PlainProgress()
