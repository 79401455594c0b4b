"""One-shot find for EVERY class of a demo folder's new scans (out/new_scans.h5: the single views, ingested), one
example per class drawn as the demo's find draws it (numpy default_rng(seed).choice over the class's scans), the
library's calibration; prints P@10 and AP per class, mean and worst.
The demo's own find runs the never-mined classes only.  Not a test: one store-wide search per class (about 10 s of
CPU each on the default demo).

    PYTHONPATH=. python tools/find_all.py DEMO_OUT [CONFIG]
"""
import json, sys, time
from pathlib import Path
import numpy as np
from protomine.cliutil import config_from
from protomine.mine.library import read_library
from protomine.ingest.sharded import open_store
from protomine.curate.oneshot import find_similar, retrieval_scores
from protomine.mine.evaluate import read_truth_table
folder = Path(sys.argv[1]); scen = json.loads((folder / "scenes" / "scenario.json").read_text()); seed = scen["demo_params"]["seed"]
cfg = config_from(sys.argv[2] if len(sys.argv) > 2 else None)
lib = read_library(folder / "library.h5"); st = open_store(folder / "new_scans.h5")
truth = read_truth_table(folder / "scenes" / "truth_full.csv")
labels = np.array([truth.get(o, {}).get("label") for o in st.ids], dtype=object)
mined = {truth[o]["label"] for o in lib.members["object"] if o in truth}
res = {}
c0 = time.process_time()
for cls in sorted({l for l in labels if l}):
    idx = np.flatnonzero(labels == cls)
    ex = int(np.random.default_rng(seed).choice(idx))
    m = find_similar(lib, st, st.ids[ex], cfg)
    others = np.array([i for i in range(len(st)) if i != ex])
    k, p, ap = retrieval_scores(m, others, labels[others] == cls)
    res[cls] = (p, ap, st.ids[ex])
    print(f"  {cls:15s} {'mined' if cls in mined else 'never mined':11s} example {st.ids[ex]:14s} P@{k} {p:.2f} AP {ap:.3f}", flush=True)
ps = [v[0] for v in res.values()]; aps = [v[1] for v in res.values()]
print(f"{folder}: find over {len(res)} classes: P@10 mean {np.mean(ps):.3f} worst {min(ps):.2f} ({min(res, key=lambda c: res[c][0])}); "
      f"AP mean {np.mean(aps):.3f}; cpu {time.process_time() - c0:.0f} s")
