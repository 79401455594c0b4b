"""Label a demo folder's single views again with the code on PYTHONPATH and print the demo's label figures (all
views, per depth model, per kind of face), optionally saving the records.

    PYTHONPATH=. python tools/relabel.py DEMO_OUT [OUT_JSON] [CONFIG]

DEMO_OUT is a `protomine demo` folder (library.h5, scenes/ with scenario.json and truth_full.csv); CONFIG a config for
the keys the library lacks.  The label stage reads the library's own recorded config; the ``[mine]`` keys a library
mined before they existed lacks are filled from CONFIG (default: the code's default config), as a library mined by
this code would record them, and listed.  Keys the library records are kept.  OUT_JSON also keeps, per record,
``view_cut`` (whether the view cuts its object off) and ``unknown_cuts`` (the cut it was flagged against), for cut-rule
studies.  Not a test: about a minute or two.
"""
from __future__ import annotations

import json
import sys
from pathlib import Path

from protomine.cliutil import config_from
from protomine.ingest.sharded import open_store
from protomine.label.evaluate import evaluate_labels, record_groups
from protomine.label.matcher import label_captures
from protomine.mine.library import read_library
from protomine.mine.pipeline import older_store_notices

FIGURES = ("n_known", "n_unknown", "accuracy", "auroc", "unknown_flagged", "known_flagged")


def fill_missing_keys(lib, cfg: dict) -> dict:
    """The ``[mine]`` keys of ``cfg`` that ``lib``'s recorded config lacks (a library mined before they existed), set
    in the in-memory library's recorded config to ``cfg``'s values; returns them.  Keys the library records are kept."""
    recorded = lib.config
    filled = {k: v for k, v in cfg["mine"].items() if k not in recorded["mine"]}
    if filled:
        recorded["mine"].update(filled)
        lib.attrs["config"] = json.dumps(recorded)   # Library.config parses this attribute on every read
    return filled


def main(argv: list[str]) -> None:
    demo = Path(argv[0])
    out = Path(argv[1]) if len(argv) > 1 else None
    cfg = config_from(Path(argv[2]) if len(argv) > 2 else None)
    lib = read_library(demo / "library.h5")
    filled = fill_missing_keys(lib, cfg)
    if filled:
        print(f"{demo.name}: filled from the config: " + ", ".join(f"{k}={v}" for k, v in filled.items()))
    if Path(lib.store_path).is_file():   # the store the library was mined from lacks what its keys read (DEVELOPERS.md)
        for notice in older_store_notices(open_store(lib.store_path), lib.config):
            print(f"{demo.name}: notice from mining: {notice}")
    scenes = demo / "scenes"
    doc = json.loads((scenes / "scenario.json").read_text())
    stats: dict = {}
    recs = label_captures(lib, [scenes / c for c in doc["single"]], cfg, seed=0, stats=stats)
    truth = scenes / "truth_full.csv"
    ev = evaluate_labels(recs, truth, lib, truth, scores=stats["scores"])
    res = {"all": {k: ev[k] for k in FIGURES}}
    for name, sub in record_groups(recs, doc.get("depth_model", {})):
        e = evaluate_labels(sub, truth, lib, truth)
        res[name] = {k: e[k] for k in FIGURES}
    for k, v in res.items():
        print(f"{demo.name:>6} {k:>16}: known / never-mined {v['n_known']} / {v['n_unknown']}, accuracy "
              f"{v['accuracy']:.3f}, AUROC {v['auroc']:.3f}, flagged {v['unknown_flagged']:.0%} / {v['known_flagged']:.0%}")
    if out is not None:
        import numpy as np   # per record: whether the view cuts its object off, and the unknown cut it was given
        extra = {k: np.asarray(stats[k]).tolist() for k in ("view_cut", "unknown_cuts") if k in stats}
        out.write_text(json.dumps({"figures": res, "records": recs, **extra}, default=float))


if __name__ == "__main__":
    main(sys.argv[1:])
