"""`protomine audit`: prototype library + held-out truth CSV -> report folder (JSON, PNGs, one HTML file)."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..cliutil import ConfigOpt, Progress, QuietOpt, SeedOpt, config_from, existing


def audit(
    library: Annotated[Path, typer.Argument(help="HDF5 prototype library (protomine mine).")],
    truth: Annotated[Path, typer.Option("--truth", "-t", help="Held-out labels CSV: object,label[,yaw_deg] or capture,x,y,z,label[,yaw_deg].")],
    out: Annotated[Path, typer.Option("--out", "-o", help="Report folder (report.json, report.html, PNGs).")],
    store: Annotated[Optional[Path], typer.Option("--store", "-s", help="Object store; default: the one recorded in the library.")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
) -> None:
    """Measure how pure the mined clusters are against a few hand labels, with honest uncertainty."""
    from .run import run_audit, summary_line
    cfg = config_from(config)
    doc = run_audit(existing(library, "library"), truth, out, cfg, store=store, seed=seed, progress=Progress("audit", quiet))
    typer.echo(summary_line(doc, out))
