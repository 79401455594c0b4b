"""Run an audit: library + store + held-out truth CSV -> report folder.  The CLI and the demo call this."""
from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np

from ..errors import InputError
from ..ingest.sharded import open_store
from ..mine.gallery import render_gallery
from ..mine.library import read_library
from ..progress import bar
from ..provenance import file_fingerprint, provenance, record_outputs
from .metrics import symmetry_to_period_deg
from .report import Assignments, build_audit, write_report
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


def run_audit(library: str | Path, truth: str | Path, out: str | Path, cfg: dict, *, store: str | Path | None = None,
              seed: int = 0, progress: Callable[[str], None] | None = None) -> dict:
    """Audit the library's clusters against the truth CSV; writes report.json, report.html and PNGs into ``out``."""
    library, truth, out = Path(library), Path(truth), Path(out)
    say = progress or (lambda msg: None)
    lib = read_library(library)
    rows = read_truth(truth)
    st = open_store(resolve_store_path(library, lib.store_path, Path(store) if store else None))
    say(f"{len(rows)} truth rows, {len(lib.members['object'])} library members, {len(st)} stored objects")
    m = lib.members
    assignments = Assignments(np.asarray(m["object"], dtype=str), m["cluster"], m["yaw_deg"], m["scale"],
                              m["distance"], m["score"])
    objects = object_table(st)
    periods = {k: symmetry_to_period_deg(int(s)) for k, s in enumerate(lib.prototypes["symmetry"])}
    prov = provenance(cfg, seed, {"library": file_fingerprint(library), "truth": file_fingerprint(truth),
                                  "store": st.fingerprint()}, command="audit")
    with bar(progress, "audit", total=2, unit="steps") as b:     # numbers (bootstrap), then pictures
        doc = build_audit(assignments, rows, objects, symmetry_period_deg=periods, names=lib.names, cfg=cfg,
                          rng=np.random.default_rng(seed), truth_path=truth, provenance=prov)
        b.advance()
        out.mkdir(parents=True, exist_ok=True)
        gallery = render_gallery(out / "gallery.png", lib.prototypes["volumes"], counts=lib.prototypes["count"],
                                 symmetry=lib.prototypes["symmetry"],
                                 names=[lib.display_name(k) for k in range(lib.n_clusters)])
        record_outputs(list(write_report(out, doc, gallery_png=gallery, crops=st.crops).values()), prov)
        b.advance()
    return doc


def summary_line(doc: dict, out: Path) -> str:
    s, n = doc["scores"], doc["counts"]
    if not s:
        return (f"no labelled object was assigned to a cluster ({n['unmatched_truth_rows']} truth rows unmatched); "
                f"report {out / 'report.html'}")
    iv = doc["intervals"]
    return (f"{n['labelled']} labelled objects in {n['clusters']} clusters: purity {s['purity']:.3f} "
            f"[{iv['purity'][0]:.3f}, {iv['purity'][1]:.3f}], NMI {s['nmi']:.3f}, "
            f"accuracy {s['hungarian_accuracy']:.3f}; {n['unmatched_truth_rows']} truth rows unmatched, "
            f"{n['unlabelled_objects']} objects unlabelled; report {out / 'report.html'}")
