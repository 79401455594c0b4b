"""The ``--scheduler`` / ``--workers`` options shared by ``protomine ingest`` and ``protomine mine``."""
from __future__ import annotations

import contextlib
from typing import Annotated, Iterator, Optional

import typer

from .executor import Executor, make_executor

SchedulerOpt = Annotated[Optional[str], typer.Option(
    "--scheduler", metavar="ADDRESS", help="Dask scheduler address (e.g. tcp://10.0.0.5:8786): run the heavy steps on that cluster "
    "(default: [scale] scheduler in the config; none = this machine).")]


def _workers(value: Optional[str]) -> Optional[int | str]:
    if value is None or value == "auto":
        return value
    if not value.isdigit() or not 1 <= int(value) <= 4096:
        raise typer.BadParameter(f"expected 'auto' or a number of workers in 1..4096, got {value!r}")
    return int(value)


WorkersOpt = Annotated[Optional[str], typer.Option(
    "--workers", callback=_workers, metavar="N|auto", help="Without --scheduler: worker processes on this "
    "machine ('auto' = the usable cores; ingest and label spread captures over them, mine runs in this process "
    "with the cores as threads; 1 = this process); with it: wait until this many workers have joined "
    "(default: [scale] workers).")]


@contextlib.contextmanager
def executor_for(cfg: dict, scheduler: str | None, workers: int | str | None, *, processes: bool = False,
                 items: int | None = None) -> Iterator[Executor]:
    """The executor of the config and flags, closed when the command ends.

    ``processes``: whether 'auto' means worker processes (ingest, label: independent captures) or this
    process with every core as torch threads (mine); ``items``: no more workers than items.
    """
    ex = make_executor(cfg, scheduler, workers, processes=processes, items=items)
    try:
        yield ex
    finally:
        ex.close()
