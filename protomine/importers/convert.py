"""``import``: source folders in a known layout -> capture folders (protomine.capture/1) in ``out``.

Each source is read, checked (the support plane from two far-apart frames, ``selfcheck``), and written into a
staging folder; all captures are renamed into ``out`` only when every source succeeded (``common``).
"""
from __future__ import annotations

import shutil
from pathlib import Path
from typing import Callable

import numpy as np

from ..errors import InputError
from ..progress import bar, detail
from .bop import read_bop_scene
from .common import ImportedCapture, publish, staged_output, write_labels, write_staged
from .plain import read_plain_folder
from .selfcheck import check_support_plane
from .tum import read_tum_sequence

LAYOUTS = ("bop", "tum", "plain")


def read_source(layout: str, src: Path, options: dict) -> ImportedCapture:
    if layout == "bop":
        return read_bop_scene(src)
    if layout == "tum":
        return read_tum_sequence(src, intrinsics=options.get("intrinsics"), tolerance_s=options.get("tolerance_s", 0.02),
                                 every=options.get("every", 1), min_baseline_m=options.get("min_baseline_m", 0.0))
    if layout == "plain":
        if options.get("intrinsics") is None:
            raise InputError(None, "--intrinsics", "plain folders need --intrinsics fx,fy,cx,cy")
        return read_plain_folder(src, intrinsics=options["intrinsics"], depth_scale=options.get("depth_scale", 1000.0),
                                 convention=options.get("convention", "opencv-c2w"))
    raise InputError(None, "LAYOUT", f"expected one of {LAYOUTS}, got {layout!r}")


def import_sources(layout: str, sources: list[Path], out: Path, *, options: dict | None = None,
                   keep_labels: Path | None = None, seed: int = 0,
                   progress: Callable[[str], None] | None = None) -> list[dict]:
    """Import every source into ``out`` (all or nothing).  Returns one summary dict per capture."""
    options = options or {}
    if keep_labels is not None and layout != "bop":
        raise InputError(None, "--keep-labels", f"only the bop layout carries object labels, got layout {layout!r}")
    names = [Path(s).name for s in sources]
    stage = staged_output(Path(out), names)
    summaries, caps = [], []
    try:
        with bar(progress, "import", total=len(sources), unit="captures") as b:
            for src in sources:
                cap = read_source(layout, Path(src), options)
                check = check_support_plane(cap, np.random.default_rng(seed))
                write_staged(stage, cap)
                summaries.append({"capture": cap.name, "frames": len(cap.frames), "skipped": cap.skipped,
                                  "notes": cap.notes, "plane_check": check,
                                  "masks": any(f.mask is not None for f in cap.frames), "instances": len(cap.labels)})
                detail(progress, f"{cap.name}: {len(cap.frames)} frames" + (
                    f", plane agrees within {check.angle_deg:.2f} deg / {check.offset_m * 1000:.1f} mm "
                    f"(frames {check.frames[0]}, {check.frames[1]})" if check.frames else
                    ", plane seen in < 2 frames: not checked"))
                cap.frames = []                         # written: free the images
                caps.append(cap)
                b.advance()
        if keep_labels is not None:
            write_labels(Path(keep_labels), caps)
        publish(stage, Path(out), names)
    except BaseException:
        shutil.rmtree(stage, ignore_errors=True)
        raise
    return summaries
