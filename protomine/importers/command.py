"""``protomine import LAYOUT SRC... --out DIR``: convert known RGB-D layouts into capture folders."""
from __future__ import annotations

from enum import Enum
from pathlib import Path
from typing import Annotated, Optional

import typer

from ..cliutil import ConfigOpt, QuietOpt, SeedOpt, VerboseOpt, config_from, reporter
from ..errors import InputError
from .convert import import_sources


class Layout(str, Enum):
    bop = "bop"
    tum = "tum"
    plain = "plain"


class Convention(str, Enum):
    opencv_c2w = "opencv-c2w"
    opencv_w2c = "opencv-w2c"
    opengl_c2w = "opengl-c2w"
    opengl_w2c = "opengl-w2c"


def _intrinsics(text: str | None) -> tuple[float, float, float, float] | None:
    if text is None:
        return None
    try:
        vals = tuple(float(x) for x in text.split(","))
    except ValueError:
        vals = ()
    if len(vals) != 4 or vals[0] <= 0 or vals[1] <= 0:
        raise InputError(None, "--intrinsics", f"expected fx,fy,cx,cy (fx, fy > 0), got {text!r}")
    return vals


def import_cmd(
    layout: Annotated[Layout, typer.Argument(help="bop: 6-D pose benchmark scene folders; tum: timestamped RGB-D "
                                             "sequences; plain: rgb/ + depth/ + poses.txt|json.")],
    sources: Annotated[list[Path], typer.Argument(help="Source folders; each becomes one capture named after it.")],
    out: Annotated[Path, typer.Option("--out", "-o", metavar="DIR", show_default=False,
                                      help="Folder the capture folders are written into.")],
    intrinsics: Annotated[Optional[str], typer.Option(help="fx,fy,cx,cy of the colour camera (plain: required; tum: "
                                                          "default the benchmark's published values).")] = None,
    depth_scale: Annotated[float, typer.Option(min=1e-6, max=1e9, help="plain: depth units per metre.")] = 1000.0,
    pose_convention: Annotated[Convention, typer.Option(help="plain: camera axes and pose direction.")] = Convention.opencv_c2w,
    tolerance: Annotated[float, typer.Option(min=0.0, max=10.0, help="tum: colour/depth association tolerance (s).")] = 0.02,
    every: Annotated[int, typer.Option(min=1, max=100000, help="tum: keep every K-th associated frame.")] = 1,
    min_baseline: Annotated[float, typer.Option(min=0.0, max=100.0, help="tum: skip frames whose camera moved less than this (m).")] = 0.0,
    keep_labels: Annotated[Optional[Path], typer.Option(help="bop: write the benchmark's obj_id per instance here "
                                                              "(truth CSV object,label for audit).")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
) -> None:
    """Convert RGB-D captures in a known layout into capture folders that ingest reads."""
    config_from(config)
    say = reporter("import", quiet, verbose)
    options = {"intrinsics": _intrinsics(intrinsics), "depth_scale": depth_scale, "convention": pose_convention.value,
               "tolerance_s": tolerance, "every": every, "min_baseline_m": min_baseline}
    summaries = import_sources(layout.value, sources, out, options=options, keep_labels=keep_labels, seed=seed,
                               progress=say)
    for s in summaries:
        check = s["plane_check"]
        typer.echo(f"{s['capture']}: {s['frames']} frames" + (", masks" if s["masks"] else ", no masks")
                   + (f", {s['instances']} instances" if s["instances"] else "")
                   + (f"; support plane agrees in frames {check.frames[0]} and {check.frames[1]} within "
                      f"{check.angle_deg:.2f} deg / {check.offset_m * 1000:.1f} mm" if check.frames else
                      "; support plane seen in fewer than two frames: not checked"))
        for note in s["notes"]:
            typer.echo(f"  note: {note}")
        for what, why in s["skipped"]:
            typer.echo(f"  skipped {what}: {why}")
