"""Progress reporting: one small API for library code, drawn as rich progress bars by the command line.

Library functions take ``progress`` (an object of this module's :class:`Progress`, any callable taking a
string, or None) and use three calls, none of which import the command-line layer:

    say(progress, "choosing K in 2..16")                 # a stage message (hidden by --quiet)
    detail(progress, f"{capture} frame {fid}: 3 objects")  # a per-item line (shown only with --verbose)
    with bar(progress, "ingest frames", total=96, unit="frames") as b:
        ...; b.advance()                                  # count, rate and time left

Where output goes: messages and bars go to stderr, results to stdout.  When both are a terminal the
bars are live rich bars (description, bar, done/total, items per second, elapsed, time left); otherwise
(a pipe, a log file, CI) each bar prints a plain line every ``PLAIN_EVERY_S`` seconds (count, rate, time
left) and one when it finishes: ``[stage] what: n/total unit in s (rate/s)``.  ``quiet`` silences everything but errors; ``verbose`` adds the per-item lines.
"""
from __future__ import annotations

import contextlib
import sys
import time
from typing import Callable, Iterator

from rich.console import Console
from rich.progress import (BarColumn, MofNCompleteColumn, ProgressColumn, TextColumn, TimeElapsedColumn,
                           TimeRemainingColumn)
from rich.progress import Progress as _RichProgress
from rich.text import Text


PLAIN_EVERY_S = 30.0     # without a live bar, a progress line at most this often


class _RateColumn(ProgressColumn):
    """Items per second with the task's unit, e.g. ``7.8 frames/s``."""

    def render(self, task) -> Text:
        speed = task.finished_speed or task.speed
        unit = task.fields.get("unit", "")
        return Text("" if speed is None else f"{speed:.1f} {unit}/s", style="progress.data.speed")


class Bar:
    """One running stage: ``advance(n)``; ``total`` may be raised when more work is found."""

    def __init__(self, owner: "Progress | None", what: str, total: int, unit: str):
        self.owner, self.what, self.total, self.unit = owner, what, int(total), unit
        self.done, self.t0, self._task = 0, time.monotonic(), None
        self._last = self.t0
        if owner is not None and owner._live is not None:
            self._task = owner._live.add_task(f"[{owner.stage}] {what}", total=max(self.total, 1), unit=unit)

    def advance(self, n: int = 1) -> None:
        self.done += int(n)
        if self._task is not None:
            self.owner._live.update(self._task, completed=self.done, total=max(self.total, self.done, 1))
        elif self.owner is not None and time.monotonic() - self._last >= PLAIN_EVERY_S:
            # no live bar (a log file, a pipe): a line now and then, so a long stage is not silent
            self._last = time.monotonic()
            secs = self._last - self.t0
            rate = self.done / max(secs, 1e-9)
            left = (self.total - self.done) / rate if rate > 0 and self.total > self.done else 0.0
            self.owner(f"{self.what}: {self.done}/{self.total} {self.unit}, {rate:.1f} {self.unit}/s, "
                       f"about {left:.0f} s left")

    def set_total(self, total: int) -> None:
        self.total = int(total)
        if self._task is not None:
            self.owner._live.update(self._task, total=max(self.total, 1))

    def _finish(self) -> None:
        if self.owner is None:
            return
        if self._task is not None:
            self.owner._live.remove_task(self._task)
        secs = time.monotonic() - self.t0
        rate = f" ({self.done / secs:.1f} {self.unit}/s)" if secs > 0 and self.done else ""
        self.owner(f"{self.what}: {self.done}/{self.total} {self.unit} in {secs:.1f} s{rate}")


class Progress:
    """Stage messages and progress bars of one command, on stderr.

    stage: the command's name, printed in front of every line.  quiet: nothing at all.  verbose: per-item
    lines too.  live: draw live bars (default: when stderr is a terminal).
    """

    def __init__(self, stage: str, quiet: bool = False, *, verbose: bool = False, live: bool | None = None):
        self.stage, self.quiet, self.verbose, self.t0 = stage, quiet, verbose and not quiet, time.monotonic()
        self.console = Console(stderr=True, highlight=False, soft_wrap=True)
        # live bars only for a person at a terminal: stdout and stderr both on it (a pipe or a log file gets
        # plain lines, never control codes)
        live = (self.console.is_terminal and sys.stdout.isatty()) if live is None else live
        self._live: _RichProgress | None = None
        self._depth = 0
        self._want_live = bool(live) and not quiet

    def __call__(self, msg: str) -> None:
        """A stage message (kept above any live bar)."""
        if self.quiet:
            return
        line = f"[{self.stage} {time.monotonic() - self.t0:6.1f}s] {msg}"
        if self._live is not None:
            self._live.console.print(line, markup=False, highlight=False)
        else:
            print(line, file=sys.stderr, flush=True)

    def detail(self, msg: str) -> None:
        """A per-item line: shown only with --verbose."""
        if self.verbose:
            self(msg)

    @contextlib.contextmanager
    def bar(self, what: str, total: int, unit: str = "items") -> Iterator[Bar]:
        if self.quiet:
            yield Bar(None, what, total, unit)
            return
        if self._want_live and self._live is None:
            self._live = _RichProgress(
                TextColumn("{task.description}"), BarColumn(bar_width=24), MofNCompleteColumn(), _RateColumn(),
                TimeElapsedColumn(), TextColumn("elapsed,"), TimeRemainingColumn(), TextColumn("left"),
                console=self.console, transient=True)
            self._live.start()
        self._depth += 1
        b = Bar(self, what, total, unit)
        try:
            yield b
        finally:
            self._depth -= 1
            if self._depth == 0 and self._live is not None:
                if b._task is not None:
                    self._live.remove_task(b._task)
                    b._task = None
                self._live.stop()
                self._live = None
            b._finish()


def say(progress: Callable[[str], None] | None, msg: str) -> None:
    """A stage message through ``progress`` (any callable taking a string, or None)."""
    if progress is not None:
        progress(msg)


def detail(progress: Callable[[str], None] | None, msg: str) -> None:
    """A per-item line: only a :class:`Progress` in verbose mode shows it (plain callables get none)."""
    fn = getattr(progress, "detail", None)
    if fn is not None:
        fn(msg)


@contextlib.contextmanager
def bar(progress: Callable[[str], None] | None, what: str, total: int, unit: str = "items") -> Iterator[Bar]:
    """A progress bar through ``progress``; a silent counter when it is None or a plain callable."""
    fn = getattr(progress, "bar", None)
    if fn is None:
        yield Bar(None, what, total, unit)
        return
    with fn(what, total, unit) as b:
        yield b


class Recorder:
    """A progress that records messages instead of printing them: for work done in another process, whose
    lines the caller replays in item order (``replay``).  Bars inside it are silent counters."""

    def __init__(self) -> None:
        self.lines: list[tuple[bool, str]] = []  # (is a detail line, message)

    def __call__(self, msg: str) -> None:
        self.lines.append((False, msg))

    def detail(self, msg: str) -> None:
        self.lines.append((True, msg))


def replay(progress: Callable[[str], None] | None, lines: list[tuple[bool, str]]) -> None:
    """Send a :class:`Recorder`'s lines to ``progress``, as if the work had run here."""
    for is_detail, msg in lines:
        (detail if is_detail else say)(progress, msg)
