"""Rows of identical items of one colour touching, without masks: render the family of tests/same_colour_rows.py
(pairs and rows of three boxes, cans, handled mugs, lamps; single objects with two alike ends, a spool and a
dumbbell lying on their side, standing, a double-ended block, and the lying ones with sizes drawn per draw
(``_v``); pairs of the lying spools and dumbbells; draws
D0..D1-1) and count, per setting of ``[ingest] seam_step_share`` / ``twin_neck_cut`` / ``twin_spread_ratio`` /
``twin_neck_step_share`` / ``twin_cannot_link`` / ``piece_convex_seam`` / ``neck_side_pieces``, the
objects separated (a single object: kept whole) (one mask-free proposal at least 0.95 pure by
the renderer's masks holding at least 0.8 of the object's masked pixels) and the proposals.  README "Touching
objects of one colour" gives its figures (draws 0-5).

    PYTHONPATH=. python tools/same_colour_rows.py OUT_DIR [D0 D1 [SETTING ...]]

SETTING: names of SETTINGS to run (all by default), e.g. "seam + neck + spread"; ROWS_ONLY=kind,kind in the
environment: only those kinds.

Captures already rendered in OUT_DIR are reused.  Not a test: it renders and ingests 48 captures for 6 draws.
"""
from __future__ import annotations

import os
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from same_colour_rows import KINDS, ONE_KINDS, VARIED_KINDS, separated, write_row_capture  # noqa: E402

from protomine.capture import read_capture  # noqa: E402
from protomine.config import load_config  # noqa: E402
from protomine.ingest.proposals import find_objects  # noqa: E402

SETTINGS = {"off": (0.0, False, 0.0), "seam": (0.4, False, 0.0), "seam + neck": (0.4, True, 0.0),
            "seam + neck + spread": (0.4, True, 0.7), "spread 0.6": (0.4, True, 0.6), "spread 0.8": (0.4, True, 0.8),
            "cannot link": (0.4, True, 0.8, 0.0, True), "twin neck 0.25": (0.4, True, 0.8, 0.25, False),
            "rows": (0.4, True, 0.8, 0.25, True), "convex seam": (0.4, True, 0.8, 0.25, True, True),
            "side pieces": (0.4, True, 0.8, 0.25, True, True, True)}
ROWS = [(kind, n) for kind in KINDS for n in (2, 3)] + [(kind, 1) for kind in ONE_KINDS + VARIED_KINDS] + [
    ("spool_side", 2), ("dumbbell_side", 2)]


def main(out: Path, d0: int, d1: int, only: list[str] | None = None) -> None:
    settings = {k: v for k, v in SETTINGS.items() if not only or k in only}
    totals = {b: {k: [0, 0, 0] for k in SETTINGS} for b in ("rows", "single objects", "pairs lying")}
    rows = [r for r in ROWS if os.environ.get("ROWS_ONLY") is None or r[0] in os.environ["ROWS_ONLY"].split(",")]
    for kind, n in rows:
        bucket = "rows" if kind in KINDS else "single objects" if n == 1 else "pairs lying"
        for d in range(d0, d1):
            folder = out / f"{kind}_{n}_{d}"
            if not (folder / "capture.json").exists():
                write_row_capture(folder, kind, n, d)
            cap = read_capture(folder)
            cfg = load_config("default")
            masked = {p.key: p for p in find_objects(cap, cfg, np.random.default_rng(0), use_masks=True).proposals}
            row = []
            for name, (share, neck, spread, *rows) in settings.items():
                cfg["ingest"]["seam_step_share"], cfg["ingest"]["twin_neck_cut"] = share, neck
                cfg["ingest"]["twin_spread_ratio"] = spread
                cfg["ingest"]["twin_neck_step_share"], cfg["ingest"]["twin_cannot_link"] = rows[:2] or (0.0, False)
                cfg["ingest"]["piece_convex_seam"] = bool(rows[2:] and rows[2])
                cfg["ingest"]["neck_side_pieces"] = bool(rows[3:] and rows[3])
                free = find_objects(cap, cfg, np.random.default_rng(0), use_masks=False)
                k, _ = separated(free, masked, n)
                tot = totals[bucket][name]
                tot[0] += n
                tot[1] += k
                tot[2] += len(free.proposals)
                row.append(f"{name} {k}/{n} ({len(free.proposals)})")
            print(folder.name, " | ".join(row), flush=True)
    for bucket, per in totals.items():
        for name, (n, k, p) in per.items():
            if n:
                print(f"{bucket}, {name}: {k} / {n} separated, {p} proposals")


if __name__ == "__main__":
    a = sys.argv[1:]
    if len(a) < 1 or len(a) == 2 or any(x not in SETTINGS for x in a[3:]):
        sys.exit(__doc__)
    main(Path(a[0]), int(a[1]) if len(a) >= 3 else 0, int(a[2]) if len(a) >= 3 else 6, a[3:])
