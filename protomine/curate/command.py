"""`protomine tag`, `protomine find`, `protomine export`: thin wrappers over names, oneshot and export."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import numpy as np
import typer

from ..atomic import clean_stale_temporaries
from ..cliutil import (CapturesArg, ConfigOpt, LibraryArg, QuietOpt, VerboseOpt, config_from, existing,
                       notice_library_config, reporter)

StoreArg = Annotated[Path, typer.Argument(metavar="STORE.h5", show_default=False,
                                          help="HDF5 object store (protomine ingest).")]


def tag(
    library: LibraryArg,
    name: Annotated[Optional[str], typer.Option("--name", "-n", metavar="NAME", help="Name to give the cluster.")] = None,
    object_id: Annotated[Optional[str], typer.Option("--object", metavar="ID",
                                                     help="Name the cluster that holds this object id.")] = None,
    cluster: Annotated[Optional[int], typer.Option("--cluster", min=0, max=100000, metavar="K",
                                                   help="Name this cluster index directly.")] = None,
    clear: Annotated[bool, typer.Option("--clear", help="Remove the cluster's name.")] = False,
    quiet: QuietOpt = False,
) -> None:
    """Name (or rename, or --clear) a cluster from one example object or by its index.

    The library is rewritten in place, and gallery.png beside it redrawn.
    """
    from .names import name_cluster
    say = reporter("tag", quiet)
    clean_stale_temporaries(library.parent)
    lib = name_cluster(existing(library, "library"), name=name, object_id=object_id, cluster=cluster, clear=clear)
    k = lib.members["cluster"][lib.member_index(object_id)] if object_id is not None else cluster
    say(f"library {library}: {lib.n_clusters} clusters, {len(lib.names)} named")
    typer.echo(f"cluster {k}: {lib.display_name(int(k))}" + (" (name cleared)" if clear else ""))


def find(
    library: LibraryArg,
    store: Annotated[Path, typer.Argument(metavar="STORE.h5", show_default=False,
                                          help="HDF5 object store holding the example and the objects to search.")],
    example: Annotated[str, typer.Option("--example", "-e", metavar="ID", show_default=False,
                                         help="Object id of the one example (ingest a new scan into the store first).")],
    out: Annotated[Path, typer.Option("--out", "-o", metavar="MATCHES.csv", show_default=False,
                                      help="CSV to write, best first: object, distance, both_ways (the "
                                      "shortlist's mean of the search both ways, which ranks it), score, yaw_deg, "
                                      "scale, cluster, qx, qy, qz, qw, face, prototype, prototype_score (with [mine] find_prototype: the "
                                      "known prototype that ranks, its calibrated score; the example itself is left out).")],
    top: Annotated[Optional[int], typer.Option("--top", min=1, max=10_000_000, metavar="N",
                                               help="Write only the best N rows.")] = None,
    add: Annotated[Optional[str], typer.Option("--add", metavar="NAME", help="Add the one-shot prototype to the "
                                               "library as a new cluster with this name.")] = None,
    config: ConfigOpt = None,
    quiet: QuietOpt = False,
) -> None:
    """Find every instance of a new item class from one example object."""
    from ..ingest.sharded import open_store
    from ..mine.library import read_library
    from ..mine.openset import library_cut
    from ..provenance import file_fingerprint, provenance, record_outputs
    from .names import check_name
    from .oneshot import add_oneshot, find_similar, write_matches
    cfg = config_from(config)
    say = reporter("find", quiet)
    if add is not None:
        check_name(add, field="--add")
    clean_stale_temporaries(out.parent)
    lib = read_library(existing(library, "library"))
    notice_library_config(lib, config, cfg, say)
    st = open_store(existing(store, "object store"))
    mt = find_similar(lib, st, example, cfg, top=top)
    p = mt.prototype
    say(f"one-shot prototype from {example}: calibration from {p.calibration} (mu {p.mu:.3f}, sigma {p.sigma:.3f}), "
        f"symmetry {p.symmetry}")
    write_matches(out, mt, top)
    record_outputs([out], provenance(cfg, 0, {"library": file_fingerprint(library), "store": st.fingerprint(),
                                              "example": example}, command="find"))
    others = mt.order
    cut = library_cut(lib)
    n_hi = int(np.sum(mt.score[others] >= cut))
    typer.echo(f"{len(others)} objects ranked (the example left out); {n_hi} score >= {cut:.4f} "
               f"(the library's unknown cut); wrote {out}")
    if add is not None:
        lib2, info = add_oneshot(library, st, example, cfg, name=add, matches=mt)
        typer.echo(f"added cluster {info['cluster']} {info['name']!r}: {info['members']} members "
                   f"({info['moved']} moved from {info['moved_from']}, {info['joined_new_objects']} new); library {library}")


def export(
    library: LibraryArg,
    source: Annotated[Path, typer.Argument(metavar="STORE.h5|LABELS.jsonl", show_default=False,
                                           help="Object store the library was mined from (exports the mined "
                                           "labels), or the output of protomine label (frames never ingested).")],
    captures: CapturesArg,
    out: Annotated[Path, typer.Option("--out", "-o", metavar="DIR", show_default=False,
                                      help="Output folder: labels.jsonl, instances.json (COCO), classes.csv, "
                                      "summary.json.")],
    min_score: Annotated[float, typer.Option("--min-score", min=0.0, max=1.0, metavar="S",
                                             help="Drop labels whose calibrated score is below S.")] = 0.0,
    config: ConfigOpt = None,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
) -> None:
    """Export bootstrapped labels (not ground truth) of every object in every frame of CAPTURE... as COCO.

    From a store: the labels mining gave the captures' objects.  From label output: the records of
    protomine label for those captures (single frames that were never ingested or mined).
    """
    from ..ingest.pipeline import check_captures
    from ..mine.library import read_library
    from .export import export_labels
    cfg = config_from(config)
    say = reporter("export", quiet, verbose)
    lib = read_library(existing(library, "library"))
    clean_stale_temporaries(out) if out.is_dir() else None
    check_captures(captures)            # every bad capture listed before any work
    s = export_labels(lib, existing(source, "store or label records"), captures, out, cfg, min_score=min_score,
                      progress=say)
    typer.echo(f"{s['labels']} labels in {s['images']} frames ({s['annotations']} COCO annotations, {s['categories']} categories); "
               f"{s['dropped_below_min_score']} dropped below --min-score {min_score}; {s['unknown_labels']} unknown; wrote {out}")
    typer.echo(s["note"])
