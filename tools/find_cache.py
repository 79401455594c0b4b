"""tools/find_all.py's examples (the demo's draw + N more per class) with each find's arrays cached, and a replay of
the re-ranking from the cache: ``[mine] find_rerank_anchors`` off and on for every example the known-class route does
not take (the only finds the key changes; the others' figures are the cached ones).  Not a test.

    PYTHONPATH=. python tools/find_cache.py cache DEMO_OUT CACHE_DIR [CONFIG] [--extra N]   # one find per example
    PYTHONPATH=. python tools/find_cache.py replay CACHE_DIR [CACHE_DIR ...] [-v]            # seconds, no search

DEMO_OUT as tools/find_all.py reads it (library.h5, new_scans.h5, scenes/).  The cache holds per example (ex<row>.npz)
its class, P@10 / AP as find ranked it, the route's decision, the one-shot distance D (N,), the reverse search, the
final key, the route's search of every store object against every prototype Dk (N, K) and the re-ranking's pairwise
table (n + 1, n + 1) (empty when the route took the example).  The replay checks that the cached re-ranking gives the
cached P@10 / AP, then prints, per demo, mean P@10 / worst class / AP over the examples and over the draw, off -> on.
"""
import argparse, glob, json, time
from pathlib import Path
import numpy as np


def cache(args):
    from protomine.cliutil import config_from
    from find_draw import find_examples   # tools/ is sys.path[0] when run as a script
    from protomine.mine.library import read_library
    from protomine.ingest.sharded import open_store
    from protomine.curate import oneshot
    from protomine.mine.evaluate import read_truth_table
    folder, out = Path(args.folder), Path(args.cache_dir)
    out.mkdir(parents=True, exist_ok=True)
    seed = json.loads((folder / "scenes" / "scenario.json").read_text())["demo_params"]["seed"]
    cfg = config_from(args.config)
    cfg["mine"]["find_rerank_anchors"] = False            # the cache is of the ranking without anchors
    lib = read_library(folder / "library.h5")
    st = open_store(folder / "new_scans.h5")
    truth = read_truth_table(folder / "scenes" / "truth_full.csv")
    labels = np.array([truth.get(o, {}).get("label") for o in st.ids], dtype=object)
    cap = {}
    known_route, rerank_pairwise = oneshot.known_route, oneshot.rerank_pairwise

    def route_spy(library, store, ex, cfg, D, tilt, *a, **k):
        cap["Dk"] = np.asarray(D)
        return known_route(library, store, ex, cfg, D, tilt, *a, **k)

    def pair_spy(*a):
        cap["pair"] = rerank_pairwise(*a)
        return cap["pair"]

    oneshot.known_route, oneshot.rerank_pairwise = route_spy, pair_spy
    np.save(out / "labels.npy", labels.astype(str))
    np.save(out / "ids.npy", np.asarray(st.ids).astype(str))
    for cls, e, drawn in find_examples(labels, seed, args.extra):
        cap.clear()
        c1 = time.process_time()
        m = oneshot.find_similar(lib, st, st.ids[e], cfg)
        others = np.array([i for i in range(len(st)) if i != e])
        k, p, ap = oneshot.retrieval_scores(m, others, labels[others] == cls)
        r = m.route
        np.savez(out / f"ex{e}.npz", ex=e, cls=cls, drawn=drawn, p=p, ap=ap, D=m.distance,
                 reverse=m.reverse if m.reverse is not None else np.zeros(0), rank_key=m.rank_key,
                 taken=bool(r is not None and r.taken), s=r.example_score if r is not None else 0.0,
                 Dk=cap.get("Dk", np.zeros((0, 0))), pair=cap.get("pair", np.zeros((0, 0))))
        print(f"  {cls:15s} ex {e:4d} {'draw ' if drawn else 'extra'} P@{k} {p:.2f} AP {ap:.3f} "
              f"{'taken' if r is not None and r.taken else 'not taken'} cpu {time.process_time() - c1:.1f} s", flush=True)


def _scores(key, labels, ids, e, cls):
    from sklearn.metrics import average_precision_score
    others = np.array([i for i in range(len(key)) if i != e])
    d = np.where(np.isfinite(key[others]), key[others], np.finfo(np.float64).max)
    rel = labels[others] == cls
    order = np.lexsort((ids[others], d))
    return float(rel[order[:min(10, int(rel.sum()))]].mean()), float(average_precision_score(rel, -d))


def _summary(rows):
    ps = {}
    for c, p, _, _ in rows:
        ps.setdefault(c, []).append(p)
    means = {c: float(np.mean(v)) for c, v in ps.items()}
    worst = min(means, key=means.get)
    draw = [r for r in rows if r[3]]
    return (f"P@10 {np.mean([r[1] for r in rows]):.3f} worst {means[worst]:.2f} ({worst}) AP "
            f"{np.mean([r[2] for r in rows]):.3f}; draw {np.mean([r[1] for r in draw]):.3f} / {np.mean([r[2] for r in draw]):.3f}")


def replay(args):
    from protomine.curate.oneshot import ranking_key
    from protomine.curate.rerank import reranked_key
    cfg_k, cfg_n, cfg_w = 13, 48, 0.3           # configs/default.toml's find_rerank, _shortlist, _weight
    for d in args.cache_dirs:
        d = Path(d)
        labels, ids = np.load(d / "labels.npy"), np.load(d / "ids.npy")
        off, on = [], []
        for f in sorted(glob.glob(str(d / "ex*.npz")), key=lambda s: int(Path(s).stem[2:])):
            z = {k: (v.item() if v.ndim == 0 else v) for k, v in np.load(f, allow_pickle=False).items()}
            e, cls = int(z["ex"]), str(z["cls"])
            off.append((cls, z["p"], z["ap"], z["drawn"]))
            if z["taken"] or not z["pair"].size:
                on.append(off[-1])
                continue
            key = ranking_key(z["D"], z["reverse"] if z["reverse"].size else None)
            order = np.lexsort((ids, key))
            short = order[(order != e) & np.isfinite(key[order])][:cfg_n]
            p0, a0 = _scores(reranked_key(key, short, z["pair"], cfg_k, cfg_w), labels, ids, e, cls)
            assert abs(p0 - z["p"]) < 1e-9 and abs(a0 - z["ap"]) < 1e-9, (f, p0, z["p"], a0, z["ap"])
            p1, a1 = _scores(reranked_key(key, short, z["pair"], cfg_k, cfg_w, z["Dk"][np.r_[e, short]]), labels, ids, e, cls)
            on.append((cls, p1, a1, z["drawn"]))
            if args.v:
                print(f"   {cls} ex {e}: P@10 / AP {p0:.1f} / {a0:.3f} -> {p1:.1f} / {a1:.3f}")
        print(f"{d.name} ({len(off)} examples, {sum(1 for r, s in zip(off, on) if r is not s)} not taken): "
              f"off {_summary(off)}  ->  on {_summary(on)}")


ap_ = argparse.ArgumentParser()
sub = ap_.add_subparsers(dest="cmd", required=True)
c = sub.add_parser("cache")
c.add_argument("folder"); c.add_argument("cache_dir"); c.add_argument("config", nargs="?"); c.add_argument("--extra", type=int, default=2)
r = sub.add_parser("replay")
r.add_argument("cache_dirs", nargs="+"); r.add_argument("-v", action="store_true")
a = ap_.parse_args()
cache(a) if a.cmd == "cache" else replay(a)
