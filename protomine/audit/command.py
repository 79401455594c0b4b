"""`protomine audit`: prototype library + held-out truth CSV -> report folder (JSON, PNGs, one HTML file)."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import numpy as np
import typer

from ..cliutil import ConfigOpt, Progress, QuietOpt, SeedOpt, config_from, existing


def audit(
    library: Annotated[Path, typer.Argument(help="HDF5 prototype library (protomine mine).")],
    truth: Annotated[Path, typer.Option("--truth", "-t", help="Held-out labels CSV: object,label[,yaw_deg] or capture,x,y,z,label[,yaw_deg].")],
    out: Annotated[Path, typer.Option("--out", "-o", help="Report folder (report.json, report.html, PNGs).")],
    store: Annotated[Optional[Path], typer.Option("--store", "-s", help="Object store; default: the one recorded in the library.")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
) -> None:
    """Measure how pure the mined clusters are against a few hand labels, with honest uncertainty."""
    from ..ingest.store import open_store
    from ..mine.gallery import render_gallery
    from ..mine.library import read_library
    from ..provenance import file_fingerprint, provenance
    from .metrics import symmetry_to_period_deg
    from .report import Assignments, build_audit, write_report
    from .truth import ObjectTable, read_truth

    cfg = config_from(config)
    say = Progress("audit", quiet)
    lib = read_library(existing(library, "library"))
    rows = read_truth(truth)
    store_path = _store_path(library, lib.store_path, store)
    st = open_store(store_path)
    say(f"{len(rows)} truth rows, {len(lib.members['object'])} library members, {len(st)} stored objects")

    m = lib.members
    assignments = Assignments(np.asarray(m["object"], dtype=str), m["cluster"], m["yaw_deg"], m["scale"],
                              m["distance"], m["score"])
    objects = ObjectTable(np.asarray(st.objects["id"], dtype=str), np.asarray(st.objects["capture"], dtype=str),
                          st.objects["center"])
    periods = {k: symmetry_to_period_deg(int(s)) for k, s in enumerate(lib.prototypes["symmetry"])}
    prov = provenance(cfg, seed, {"library": file_fingerprint(library), "truth": file_fingerprint(truth),
                                  "store": st.fingerprint()}, command="audit")
    audit_doc = build_audit(assignments, rows, objects, symmetry_period_deg=periods, names=lib.names, cfg=cfg,
                            rng=np.random.default_rng(seed), truth_path=truth, provenance=prov)
    say("numbers done; drawing")
    out.mkdir(parents=True, exist_ok=True)
    gallery = render_gallery(out / "gallery.png", lib.prototypes["volumes"], counts=lib.prototypes["count"],
                             symmetry=lib.prototypes["symmetry"],
                             names=[lib.display_name(k) for k in range(lib.n_clusters)])
    write_report(out, audit_doc, gallery_png=gallery, crops=st.crops)
    s, n = audit_doc["scores"], audit_doc["counts"]
    if s:
        iv = audit_doc["intervals"]
        typer.echo(f"{n['labelled']} labelled objects in {n['clusters']} clusters: purity {s['purity']:.3f} "
                   f"[{iv['purity'][0]:.3f}, {iv['purity'][1]:.3f}], NMI {s['nmi']:.3f}, "
                   f"accuracy {s['hungarian_accuracy']:.3f}; {n['unmatched_truth_rows']} truth rows unmatched, "
                   f"{n['unlabelled_objects']} objects unlabelled; report {out / 'report.html'}")
    else:
        typer.echo(f"no labelled object was assigned to a cluster ({n['unmatched_truth_rows']} truth rows unmatched); "
                   f"report {out / 'report.html'}")


def _store_path(library: Path, recorded: str, given: Path | None) -> Path:
    """--store if given; else the library's recorded store path (relative paths tried beside the library)."""
    from ..errors import InputError
    if given is not None:
        return existing(given, "object store")
    if not recorded:
        raise InputError(library, "store_path", "library records no object store; pass --store")
    p = Path(recorded)
    for cand in (p, library.parent / p):
        if cand.is_file():
            return cand
    raise InputError(library, "store_path", f"recorded object store {recorded!r} not found; pass --store")
