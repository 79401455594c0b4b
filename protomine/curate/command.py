"""`protomine tag`, `protomine find`, `protomine export`: thin wrappers over names, oneshot and export."""
from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import numpy as np
import typer

from ..atomic import clean_stale_temporaries
from ..cliutil import ConfigOpt, Progress, QuietOpt, SeedOpt, config_from, existing


def tag(
    library: Annotated[Path, typer.Argument(help="HDF5 prototype library (protomine mine).")],
    name: Annotated[Optional[str], typer.Option("--name", "-n", help="Name to give the cluster.")] = None,
    object_id: Annotated[Optional[str], typer.Option("--object", "-o", help="Name the cluster that holds this object id.")] = None,
    cluster: Annotated[Optional[int], typer.Option("--cluster", "-k", min=0, max=100000, help="Name this cluster index directly.")] = None,
    clear: Annotated[bool, typer.Option("--clear", help="Remove the cluster's name.")] = False,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
) -> None:
    """Name (or rename, or --clear) a cluster from one example object or by its index."""
    from .names import name_cluster
    config_from(config)
    say = Progress("tag", quiet)
    clean_stale_temporaries(library.parent)
    lib = name_cluster(existing(library, "library"), name=name, object_id=object_id, cluster=cluster, clear=clear)
    k = lib.members["cluster"][lib.member_index(object_id)] if object_id is not None else cluster
    say(f"library {library}: {lib.n_clusters} clusters, {len(lib.names)} named")
    typer.echo(f"cluster {k}: {lib.display_name(int(k))}" + (" (name cleared)" if clear else ""))


def find(
    library: Annotated[Path, typer.Argument(help="HDF5 prototype library (protomine mine).")],
    store: Annotated[Path, typer.Argument(help="HDF5 object store holding the example and the objects to search.")],
    example: Annotated[str, typer.Option("--example", "-e", help="Object id of the one example (ingest a new scan into the store first).")],
    out: Annotated[Path, typer.Option("--out", help="CSV to write: object, distance, score, yaw_deg, scale, cluster (best first).")],
    top: Annotated[Optional[int], typer.Option("--top", min=1, max=10_000_000, help="Write only the best N rows.")] = None,
    add: Annotated[Optional[str], typer.Option("--add", help="Add the one-shot prototype to the library as a new cluster with this name.")] = None,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
) -> None:
    """Find every instance of a new item class from one example object."""
    from ..ingest.sharded import open_store
    from ..mine.library import read_library
    from .names import check_name
    from ..provenance import file_fingerprint, provenance, write_sidecar
    from .oneshot import add_oneshot, find_similar, write_matches
    cfg = config_from(config)
    say = Progress("find", quiet)
    if add is not None:
        check_name(add, field="--add")
    clean_stale_temporaries(out.parent)
    lib = read_library(existing(library, "library"))
    st = open_store(existing(store, "object store"))
    mt = find_similar(lib, st, example, cfg, top=top)
    p = mt.prototype
    say(f"one-shot prototype from {example}: calibration from {p.calibration} (mu {p.mu:.3f}, sigma {p.sigma:.3f}), "
        f"symmetry {p.symmetry}")
    write_matches(out, mt, top)
    write_sidecar(out, provenance(cfg, seed, {"library": file_fingerprint(library), "store": st.fingerprint(),
                                              "example": example}, command="find"))
    n_hi = int(np.sum(mt.score >= cfg["label"]["unknown_score"]))
    typer.echo(f"{len(mt.object)} objects ranked; {n_hi} score >= {cfg['label']['unknown_score']}; wrote {out}")
    if add is not None:
        lib2, info = add_oneshot(library, st, example, cfg, name=add, matches=mt)
        typer.echo(f"added cluster {info['cluster']} {info['name']!r}: {info['members']} members "
                   f"({info['moved']} moved from {info['moved_from']}, {info['joined_new_objects']} new); library {library}")


def export(
    library: Annotated[Path, typer.Argument(help="HDF5 prototype library (protomine mine).")],
    store: Annotated[Path, typer.Argument(help="HDF5 object store the library was mined from.")],
    captures: Annotated[list[Path], typer.Option("--captures", "-i", help="Capture folders to export (repeat the option).")],
    out: Annotated[Path, typer.Option("--out", help="Output folder: labels.jsonl, instances.json (COCO), classes.csv, summary.json.")],
    min_score: Annotated[float, typer.Option("--min-score", min=0.0, max=1.0, help="Drop labels whose calibrated score is below this.")] = 0.0,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
) -> None:
    """Export bootstrapped labels (not ground truth) of every object in every frame of mined captures."""
    from ..ingest.sharded import open_store
    from ..mine.library import read_library
    from .export import export_labels
    cfg = config_from(config)
    say = Progress("export", quiet)
    lib = read_library(existing(library, "library"))
    st = open_store(existing(store, "object store"))
    clean_stale_temporaries(out) if out.is_dir() else None
    s = export_labels(lib, st, [existing(c, "capture folder") for c in captures], out, cfg, min_score=min_score, seed=seed, progress=say)
    typer.echo(f"{s['labels']} labels in {s['images']} frames ({s['annotations']} COCO annotations, {s['categories']} categories); "
               f"{s['dropped_below_min_score']} dropped below --min-score {min_score}; {s['unknown_labels']} unknown; wrote {out}")
    typer.echo(s["note"])
