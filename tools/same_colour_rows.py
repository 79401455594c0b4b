"""Rows of identical items of one colour touching, without masks: render the family of tests/same_colour_rows.py
(pairs and rows of three boxes, cans, handled mugs, lamps; draws D0..D1-1) and count, per setting of
``[ingest] seam_step_share`` / ``twin_neck_cut``, the objects separated (one mask-free proposal at least 0.95 pure by
the renderer's masks holding at least 0.8 of the object's masked pixels) and the proposals.  README "Touching
objects of one colour" gives its figures (draws 0-5).

    PYTHONPATH=. python tools/same_colour_rows.py OUT_DIR [D0 D1]

Captures already rendered in OUT_DIR are reused.  Not a test: it renders and ingests 48 captures for 6 draws.
"""
from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from same_colour_rows import KINDS, separated, write_row_capture  # noqa: E402

from protomine.capture import read_capture  # noqa: E402
from protomine.config import load_config  # noqa: E402
from protomine.ingest.proposals import find_objects  # noqa: E402

SETTINGS = {"off": (0.0, False), "seam": (0.4, False), "seam + neck": (0.4, True)}


def main(out: Path, d0: int, d1: int) -> None:
    totals = {k: [0, 0, 0] for k in SETTINGS}
    for kind in KINDS:
        for n in (2, 3):
            for d in range(d0, d1):
                folder = out / f"{kind}_{n}_{d}"
                if not (folder / "capture.json").exists():
                    write_row_capture(folder, kind, n, d)
                cap = read_capture(folder)
                cfg = load_config("default")
                masked = {p.key: p for p in find_objects(cap, cfg, np.random.default_rng(0), use_masks=True).proposals}
                row = []
                for name, (share, neck) in SETTINGS.items():
                    cfg["ingest"]["seam_step_share"], cfg["ingest"]["twin_neck_cut"] = share, neck
                    free = find_objects(cap, cfg, np.random.default_rng(0), use_masks=False)
                    k, _ = separated(free, masked, n)
                    totals[name][0] += n
                    totals[name][1] += k
                    totals[name][2] += len(free.proposals)
                    row.append(f"{name} {k}/{n} ({len(free.proposals)})")
                print(folder.name, " | ".join(row), flush=True)
    for name, (n, k, p) in totals.items():
        print(f"{name}: {k} / {n} separated, {p} proposals")


if __name__ == "__main__":
    a = sys.argv[1:]
    if len(a) not in (1, 3):
        sys.exit(__doc__)
    main(Path(a[0]), int(a[1]) if len(a) == 3 else 0, int(a[2]) if len(a) == 3 else 6)
