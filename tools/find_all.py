"""One-shot find for EVERY class of a demo folder's new scans (out/new_scans.h5: the single views, ingested), one
example per class drawn as the demo's find draws it (numpy default_rng(seed).choice over the class's scans), the
library's calibration; prints P@10 and AP per example, then the mean and the worst class (the mean of its examples).
``--extra N``: N more examples per class (default_rng(seed + 1).choice of the class's other scans, without
replacement; 2 gives the 30-example evaluation of README "Find"); the draw's own figures are printed too.
``--store objects.h5``: the mined store instead (its multi-view fused objects are both the examples and the searched
store, as ``protomine find library.h5 objects.h5 -e ID``; every class is then a mined one).  Each find line says
how it ranked: the known-class route's prototype (by the majority class of its members; "members" when ``[mine]
find_member_route`` took it) or the one-shot ranking ("own"); the per-class means are printed at the end.
The demo's own find runs the never-mined classes only.  Not a test: one store-wide search per example (about 5-10 s
of CPU each on the default demo).

    PYTHONPATH=. python tools/find_all.py DEMO_OUT [CONFIG] [--extra N] [--store objects.h5]
"""
import argparse, json, time
from pathlib import Path
import numpy as np
from protomine.cliutil import config_from
from protomine.mine.library import read_library
from protomine.ingest.sharded import open_store
from protomine.curate.oneshot import find_similar, retrieval_scores
from protomine.mine.evaluate import read_truth_table
from find_draw import find_examples   # tools/ is sys.path[0] when run as a script

ap_ = argparse.ArgumentParser()
ap_.add_argument("folder"); ap_.add_argument("config", nargs="?"); ap_.add_argument("--extra", type=int, default=0)
ap_.add_argument("--store", default="new_scans.h5", help="the store searched and drawn from, in DEMO_OUT")
args = ap_.parse_args()
folder = Path(args.folder); scen = json.loads((folder / "scenes" / "scenario.json").read_text()); seed = scen["demo_params"]["seed"]
cfg = config_from(args.config)
lib = read_library(folder / "library.h5"); st = open_store(folder / args.store)
truth = read_truth_table(folder / "scenes" / "truth_full.csv")
labels = np.array([truth.get(o, {}).get("label") for o in st.ids], dtype=object)
mined = {truth[o]["label"] for o in lib.members["object"] if o in truth}
# each cluster's majority class, to say which prototype a taken route ranked by
cnames = {}
for o, k in zip(lib.members["object"], lib.members["cluster"]):
    if o in truth:
        cnames.setdefault(int(k), []).append(truth[o]["label"])
cnames = {k: max(set(v), key=v.count) for k, v in cnames.items()}
rows = []          # (class, drawn by the demo's draw, P@10, AP, cpu s)
c0 = time.process_time()
for cls, e, drawn in find_examples(labels, seed, args.extra):
    c1 = time.process_time()
    m = find_similar(lib, st, st.ids[e], cfg)
    cpu = time.process_time() - c1
    others = np.array([i for i in range(len(st)) if i != e])
    k, p, ap = retrieval_scores(m, others, labels[others] == cls)
    rows.append((cls, drawn, p, ap, cpu))
    how = (f"{'members' if m.route.member_rank >= 0 else 'route'} {cnames.get(int(m.route.cluster), '?')} "
           f"({m.route.example_score:.2f})" if m.route is not None and m.route.taken else "own")
    print(f"  {cls:15s} {'mined' if cls in mined else 'never mined':11s} example {st.ids[e]:14s} "
          f"{'draw ' if drawn else 'extra'} P@{k} {p:.2f} AP {ap:.3f} {how:26s} cpu {cpu:.1f} s", flush=True)


def summary(sel, what):
    ps = {}
    for r in sel:
        ps.setdefault(r[0], []).append(r[2])
    means = {c: float(np.mean(v)) for c, v in ps.items()}
    worst = min(means, key=means.get)
    print(f"{folder}: {what}: {len(sel)} finds over {len(means)} classes: P@10 mean {np.mean([r[2] for r in sel]):.3f} "
          f"worst class {means[worst]:.2f} ({worst}); AP mean {np.mean([r[3] for r in sel]):.3f}; "
          f"cpu per find {np.mean([r[4] for r in sel]):.1f} s")
    print("  per class P@10: " + ", ".join(f"{c} {v:.2f}" for c, v in sorted(means.items())))


summary([r for r in rows if r[1]], "the demo's draw")
if args.extra:
    summary(rows, f"the draw + {args.extra} more per class")
print(f"cpu {time.process_time() - c0:.0f} s")
