"""For one-shot find's examples: the member route's reciprocal test asked of EVERY cluster, not only of the example's
nearest by its members (``[mine] find_member_route``, ``curate/knownclass.py`` 7.).  Per example: its 3 nearest
clusters by the members' k-NN distance (``class_knn``), and for each cluster c its rank among c's shortlist by the
margin on the members (``reciprocal_member_rank``: how many of c's first ``find_members_shortlist`` objects by the
prototype's fused key have a lower margin than the example) and its own margin.  The route takes c when that rank is
below r; this says whether any other cluster would have passed.  Not a test: about 8 member searches of the
shortlist per example (~60-90 s CPU each on the default demo).

    PYTHONPATH=. python tools/member_ranks.py DEMO_OUT EXAMPLE_ID[,EXAMPLE_ID...] [CONFIG]
"""
import sys
from pathlib import Path
import numpy as np
from protomine.cliutil import config_from
from protomine.mine.library import read_library
from protomine.ingest.sharded import open_store
from protomine.curate import oneshot as O
from protomine.curate import knownclass as KC
from protomine.mine.memberknn import class_knn, cluster_members, load_members, searched_distances
from protomine.mine.evaluate import read_truth_table

folder = Path(sys.argv[1]); exs = sys.argv[2].split(",")
cfg = config_from(sys.argv[3] if len(sys.argv) > 3 else None)
mc = cfg["mine"]
k, n, fuse, n_sym = int(mc["find_members"]), int(mc["find_members_shortlist"]), float(mc["find_prototype_fuse"]), int(mc["find_symmetric"])
lib = read_library(folder / "library.h5"); st = open_store(folder / "new_scans.h5")
truth = read_truth_table(folder / "scenes" / "truth_full.csv")
names = {}
for o, c in zip(lib.members["object"], lib.members["cluster"]):          # each cluster's majority class
    if o in truth:
        names.setdefault(int(c), []).append(truth[o]["label"])
names = {c: max(set(v), key=v.count) for c, v in names.items()}
weights = O._feature_weights(lib, cfg); scales = tuple(lib.scales); grid = O._grid(lib)
chunk = int(mc["chunk_size"])
src = st.source({"mine": {"free_weight": weights[0], "colour_weight": weights[1]}})
p = lib.prototypes
Dk = O._search_many(src, np.asarray(p["features"], np.float32), np.asarray(p["weights"], np.float32),
                    np.asarray(p["aspect"], np.float64), scales, grid, chunk)
mem = load_members(lib, weights[0], weights[1], st)
if mem is None:
    sys.exit("the library's members are not in its mined store")
K = lib.n_clusters
for eid in exs:
    ex = st.index_of(eid)
    X1, W1 = O._features(st, np.array([ex]), weights)
    D = O._search(src, X1, W1, float(O._aspects(st, np.array([ex]))[0]), scales, grid, chunk)[0]
    rev = O._reverse_distances(st, ex, D, X1[0], W1[0], weights, scales, grid, n_sym) if n_sym else None
    d1 = O.both_ways(D, rev)
    De = searched_distances(X1, W1, mem.P, mem.V, mem.aspect,
                            [(np.zeros(1, np.int64), cluster_members(mem.cluster, c)) for c in range(K)], scales, grid)
    De[0, mem.ids == str(eid)] = np.inf
    kd = class_knn(De, mem.cluster, K, k)[0]
    ranks = []
    for c in range(K):
        base = KC.margin_key(Dk, c)
        base = KC.fused_key(base, d1, fuse) if fuse > 0 else base
        short = O._nearest(st, ex, base)[:n]
        km = O._member_margins(st, np.concatenate([short, [ex]]), mem, c, K, weights, scales, grid, k)
        ranks.append((KC.reciprocal_member_rank(km[:-1], float(km[-1])), float(km[-1])))
    print(f"{eid} ({truth.get(eid, {}).get('label', '?')}): nearest by members "
          + ", ".join(f"{names.get(c, c)} {kd[c]:.4f}" for c in np.argsort(kd)[:3])
          + "; rank / margin per cluster: " + ", ".join(f"{names.get(c, c)} {r} / {m:.2f}" for c, (r, m) in enumerate(ranks)),
          flush=True)
