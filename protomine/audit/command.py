"""`protomine audit`: prototype library (+ held-out truth CSV) -> report folder, and a labelling plan."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from ..cliutil import ConfigOpt, LibraryArg, QuietOpt, SeedOpt, VerboseOpt, config_from, existing, reporter


def audit(
    library: LibraryArg,
    out: Annotated[Path, typer.Option("--out", "-o", metavar="DIR", show_default=False,
                                      help="Report folder (report.html, report.json, PNGs, labelling sheet).")],
    truth: Annotated[Optional[Path], typer.Argument(metavar="[TRUTH.csv]", show_default=False,
                                                    help="Hand labels CSV: object,label[,yaw_deg] or capture,x,y,z,label[,yaw_deg]; "
                                                    "a filled-in labelling sheet works as it is.")] = None,
    plan: Annotated[int, typer.Option("--plan", min=0, max=1_000_000, metavar="N",
                                      help="Choose the next N objects to label: labelling_sheet.csv (fill in its label "
                                      "column, pass it back as TRUTH.csv) and labelling_sheet.png.")] = 0,
    store: Annotated[Optional[Path], typer.Option("--store", "-s", metavar="STORE.h5",
                                                  help="Object store; default: the one recorded in the library.")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
) -> None:
    """Measure how pure the mined clusters are against a few hand labels, with intervals that hold at small n,
    and say which objects to label next."""
    from ..errors import InputError
    from .run import run_audit, summary_line
    if truth is None and plan == 0:
        raise InputError(None, "TRUTH.csv/--plan", "give TRUTH.csv (hand labels), --plan N (objects to label next), or both")
    cfg = config_from(config)
    doc = run_audit(existing(library, "library"), truth, out, cfg, store=store, seed=seed, plan=plan,
                    progress=reporter("audit", quiet, verbose))
    typer.echo(summary_line(doc, out))
