"""The ``--scheduler`` / ``--workers`` options shared by ``protomine ingest`` and ``protomine mine``."""
from __future__ import annotations

import contextlib
from typing import Annotated, Iterator, Optional

import typer

from .executor import Executor, make_executor

SchedulerOpt = Annotated[Optional[str], typer.Option(
    "--scheduler", metavar="ADDRESS", help="Dask scheduler address (e.g. tcp://10.0.0.5:8786): run the heavy steps on that cluster "
    "(default: [scale] scheduler in the config; none = this machine).")]
WorkersOpt = Annotated[Optional[int], typer.Option(
    "--workers", min=1, max=4096, metavar="N", help="Without --scheduler: worker processes on this machine (1 = this process); "
    "with it: wait until this many workers have joined (default: [scale] workers).")]


@contextlib.contextmanager
def executor_for(cfg: dict, scheduler: str | None, workers: int | None) -> Iterator[Executor]:
    """The executor of the config and flags, closed when the command ends."""
    ex = make_executor(cfg, scheduler, workers)
    try:
        yield ex
    finally:
        ex.close()
