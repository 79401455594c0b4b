"""Run an audit: library + store (+ held-out truth CSV) -> report folder, and the next objects to label.

The CLI and the demo call this.  Randomness (bootstrap, label-propagation draws, the plan's random picks)
comes from one generator seeded once.
"""
from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np

from ..errors import InputError
from ..ingest.sharded import open_store
from ..mine.gallery import render_gallery
from ..mine.library import Library, read_library
from ..mine.pipeline import library_gallery_faces
from ..progress import bar
from ..provenance import file_fingerprint, provenance, record_outputs
from .metrics import symmetry_to_period_deg
from .plan import choose_objects, member_uncertainty, plan_rows, write_sheet
from .report import Assignments, jsonable, build_audit, write_report
from .truth import object_table, read_truth


def resolve_store_path(library: Path, recorded: str, given: Path | None) -> Path:
    """``given`` if set; else the library's recorded store path (relative paths tried beside the library)."""
    if given is not None:
        if not Path(given).is_file():
            raise InputError(given, None, "object store not found")
        return Path(given)
    if not recorded:
        raise InputError(library, "store_path", "library records no object store; pass --store")
    p = Path(recorded)
    for cand in (p, library.parent / p):
        if cand.is_file():
            return cand
    raise InputError(library, "store_path", f"recorded object store {recorded!r} not found; pass --store")


def run_audit(library: str | Path, truth: str | Path | None, out: str | Path, cfg: dict, *,
              store: str | Path | None = None, seed: int = 0, plan: int = 0,
              progress: Callable[[str], None] | None = None) -> dict:
    """Audit the library's clusters against the truth CSV (None: no labels yet) and, with ``plan`` > 0,
    choose the next ``plan`` objects to label; writes report.json, report.html, PNGs and the labelling
    sheet into ``out``."""
    library, out = Path(library), Path(out)
    say = progress or (lambda msg: None)
    lib = read_library(library)
    rows = read_truth(truth) if truth is not None else []
    st = open_store(resolve_store_path(library, lib.store_path, Path(store) if store else None))
    say(f"{len(rows)} truth rows, {len(lib.members['object'])} library members, {len(st)} stored objects")
    m = lib.members
    assignments = Assignments(np.asarray(m["object"], dtype=str), m["cluster"], m["yaw_deg"], m["scale"],
                              m["distance"], m["score"], rotation=np.asarray(m["rotation"], np.float64))
    objects = object_table(st)
    periods = {k: symmetry_to_period_deg(int(s)) for k, s in enumerate(lib.prototypes["symmetry"])}
    inputs = {"library": file_fingerprint(library), "store": st.fingerprint()}
    if truth is not None:
        inputs["truth"] = file_fingerprint(truth)
    prov = provenance(cfg, seed, inputs, command="audit")
    rng = np.random.default_rng(seed)
    with bar(progress, "audit", total=2, unit="steps") as b:     # numbers (bootstrap, open set, plan), then pictures
        doc = build_audit(assignments, rows, objects, symmetry_period_deg=periods, names=lib.names, cfg=cfg,
                          rng=rng, truth_path=truth, provenance=prov,
                          symmetry_groups={k: lib.symmetry_group(k) for k in range(lib.n_clusters)})
        if doc["labelled_objects"]:
            doc["open_set"] = jsonable(open_set_on_labelled(lib, st, doc, cfg))
        out.mkdir(parents=True, exist_ok=True)
        written: list[Path] = []
        if plan > 0:
            doc["plan"], sheet = _plan(lib, st, assignments, doc, plan, cfg, rng, out)
            written += sheet
        b.advance()
        gallery = render_gallery(out / "gallery.png", lib.prototypes["volumes"], counts=lib.prototypes["count"],
                                 symmetry=lib.prototypes["symmetry"],
                                 names=[lib.display_name(k) for k in range(lib.n_clusters)],
                                 faces=library_gallery_faces(lib))
        written += write_report(out, doc, gallery_png=gallery, crops=st.crops).values()
        record_outputs(written, prov)
        b.advance()
    return doc


def _plan(lib: Library, st, asg: Assignments, doc: dict, n: int, cfg: dict, rng: np.random.Generator,
          out: Path) -> tuple[dict, list[Path]]:
    m = lib.members
    labelled_label = {r["object"]: r["label"] for r in doc["labelled_objects"]}
    majority = {c["cluster"]: c["majority_label"] for c in doc["clusters"]}
    labelled = np.array([o in labelled_label for o in asg.object_ids.tolist()])
    agree = np.array([labelled_label.get(o) == majority.get(int(c)) for o, c in zip(asg.object_ids.tolist(), asg.cluster.tolist())])
    u = member_uncertainty(m["score"], m["distance"], m["second_distance"])
    share = float(cfg["audit"]["plan_random_share"])
    idx, rnd = choose_objects(asg.cluster, u, labelled, n, rng, random_share=share, agree=agree)
    rows = plan_rows(st, asg.object_ids[idx], asg.cluster[idx], rnd, lib.names)
    paths = write_sheet(out, rows, st.crops)
    per_cluster: dict[int, int] = {}
    for r in rows:
        per_cluster[r.cluster] = per_cluster.get(r.cluster, 0) + 1
    info = {"objects": len(rows), "asked": int(n), "sheet": "labelling_sheet.csv", "pictures": "labelling_sheet.png",
            "per_cluster": per_cluster, "random_share": share,
            "how": f"Neyman allocation over clusters by size and current uncertainty; within a cluster "
                   f"{share:.0%} at random, the rest the members the library is least sure of"}
    return jsonable(info), list(paths.values())


def open_set_on_labelled(lib: Library, st, doc: dict, cfg: dict) -> dict:
    """What the library's unknown cut does to the stored single views of the labelled objects.

    Each view is matched as the label stage matches a new frame (``label.matcher``); it is flagged when
    no prototype overlaps it or its nearest prototype's score is below the cut.  Counted apart: views whose
    nearest prototype is their own object's cluster (a flag there is a false flag, the rate alpha bounds)
    and views nearest to another cluster (they would be labelled wrong, so a flag there is a catch), and
    views of labelled objects whose label disagrees with their cluster's majority.
    """
    from ..label.matcher import make_matcher
    matcher = make_matcher(lib, cfg)
    cut = matcher.unknown_cut   # the library's cut, or its other-face rule's (mine.openset)
    info = {"alpha": float(lib.attrs.get("unknown_alpha", float("nan"))), "cut": cut,
            "calibration_views": int(lib.attrs.get("unknown_calibration_views", 0)),
            "note": ("Views stored at ingest (one frame each), matched like a new frame; these objects helped build "
                     "their prototypes, so for small clusters the rate is optimistic. The rate on frames never mined "
                     "is what the label stage measures (protomine demo prints it).")}
    majority = {c["cluster"]: c["majority_label"] for c in doc["clusters"]}
    wrong = {r["object"]: r["label"] != majority.get(r["cluster"]) for r in doc["labelled_objects"]}
    cluster_of = {r["object"]: r["cluster"] for r in doc["labelled_objects"]}
    index = np.array([st.index_of(o) for o in wrong], dtype=np.int64)
    rows = np.sort(np.flatnonzero(np.isin(st.single_object, index)))
    info.update(views=int(rows.size), objects=int(np.unique(st.single_object[rows]).size), flagged=0, rate=0.0,
                nearest_own=0, flagged_own=0, rate_own=0.0, nearest_other=0, flagged_other=0,
                disagreeing=0, flagged_disagreeing=0)
    if rows.size == 0:
        return info
    res = matcher.match(st.read_single_views(rows))
    best = res["best"]
    score = np.where(best >= 0, res["score"][np.arange(best.size), np.maximum(best, 0)], 0.0)
    flagged = (best < 0) | (score < cut)
    ids = np.asarray(st.objects["id"], dtype=str)[st.single_object[rows]].tolist()
    bad = np.array([wrong[o] for o in ids], dtype=bool)
    own = best == np.array([cluster_of[o] for o in ids])
    info.update(flagged=int(flagged.sum()), rate=float(flagged.mean()),
                nearest_own=int(own.sum()), flagged_own=int((flagged & own).sum()),
                rate_own=float((flagged & own).sum() / max(own.sum(), 1)),
                nearest_other=int((~own).sum()), flagged_other=int((flagged & ~own).sum()),
                disagreeing=int(bad.sum()), flagged_disagreeing=int((flagged & bad).sum()))
    return info


def summary_line(doc: dict, out: Path) -> str:
    """The line the CLI prints: the headline and where the report (and the sheet) went."""
    tail = f" Report: {out / 'report.html'}"
    if doc.get("plan"):
        tail += f"; {doc['plan']['objects']} objects to label next in {out / doc['plan']['sheet']}"
    return doc["headline"] + tail
