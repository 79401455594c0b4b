"""`protomine demo`: the whole job on the built-in scenario, with every figure measured against its truth.

scenes (rendered, or reused when already there for the same settings) -> ingest (mining captures) ->
mine -> quality vs truth (and the pose-unaware baseline) -> label held-out single views -> name each
cluster from one example -> one-shot search for a class left out of mining -> export -> audit against a
held-out subset of the truth -> report.html.

The truth files are read only here, to measure; ingest, mine and label never see them.
"""
from __future__ import annotations

import csv
import io
import json
import time
from pathlib import Path
from typing import Annotated, Optional

import numpy as np
import typer

from .atomic import write_text
from .cliutil import ConfigOpt, QuietOpt, SeedOpt, VerboseOpt, config_from, reporter
from .scale.options import executor_for

FULL_SIZE = (320, 240)  # rendered image size (width, height) in pixels
QUICK_SIZE = (160, 120)
AUDIT_FRACTION = 0.4   # share of mined objects whose truth is handed to the audit as "hand labels"


def _scenario_matches(folder: Path, params: dict) -> bool:
    p = folder / "scenario.json"
    if not p.is_file():
        return False
    try:
        doc = json.loads(p.read_text())
    except json.JSONDecodeError:
        return False
    return doc.get("demo_params") == params


def heldout_subset(truth_csv: Path, mined_ids: list[str], out_csv: Path, fraction: float, rng: np.random.Generator) -> int:
    """Write object,label,yaw_deg,qx,qy,qz,qw for a random ``fraction`` of the mined objects (the audit's hand
    labels; the quaternion is the truth pose, x_world = R x_model + t, when the scenario gives it)."""
    with open(truth_csv, newline="") as fh:
        rows = {r["object"]: r for r in csv.DictReader(fh)}
    ids = [o for o in mined_ids if o in rows]
    pick = sorted(rng.choice(len(ids), size=max(1, int(round(fraction * len(ids)))), replace=False))
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["object", "label", "yaw_deg", "qx", "qy", "qz", "qw"])
    for i in pick:
        r = rows[ids[i]]
        w.writerow([r["object"], r["class"], r["yaw_deg"] if r["symmetry"] != "continuous" else "",
                    *(r.get(c, "") for c in ("qx", "qy", "qz", "qw"))])
    write_text(out_csv, buf.getvalue())
    return len(pick)


def _export_line(summary: dict) -> str:
    keys = [k for k in ("images", "labels", "annotations", "dropped_below_min_score") if k in summary]
    return ", ".join(f"{summary[k]} {k}" for k in keys) if keys else "written"


# --- work the demo runs beside its own, on a worker of its pool (module-level: pickled by reference) ---------

def _later(executor, fn, item):
    """``fn(None, item)`` started now on a worker of the demo's pool (``executor.submit``), or run here at once
    when the executor has no workers to spare (``--workers 1``, Dask): something with ``result()``."""
    if getattr(executor, "submit", None) is None:
        from .scale.executor import InlineExecutor
        executor = InlineExecutor()
    return executor.submit(fn, None, item)


def _baseline_item(_, item: tuple) -> dict:
    from .ingest.sharded import open_store
    from .mine.evaluate import kmeans_baseline
    store, cfg, truth, k, seed = item
    return kmeans_baseline(open_store(store), cfg, truth, k, seed)


def _overlays_item(_, item: tuple) -> list:
    from .capture import read_capture
    from .label.overlays import write_overlays
    from .progress import Recorder
    folder, captures, recs, prov = item
    rec = Recorder()
    write_overlays(folder, [read_capture(c) for c in captures], recs, prov, progress=rec)
    return rec.lines


def _scans_item(_, item: tuple) -> list:
    from .ingest.pipeline import ingest_captures
    from .progress import Recorder
    singles, scans, cfg, seed = item
    rec = Recorder()
    ingest_captures(singles, scans, cfg, seed=seed, progress=rec)
    return rec.lines


def _pictures_item(_, item: tuple) -> None:
    from .curate.names import refresh_gallery
    lib, library, clusters = item
    refresh_gallery(lib, library, clusters=clusters)


def _export_item(_, item: tuple) -> tuple[dict, list]:
    from .curate.export import export_labels
    from .ingest.sharded import open_store
    from .progress import Recorder
    lib, store, mining, folder, cfg = item
    rec = Recorder()
    return export_labels(lib, open_store(store), mining, folder, cfg, progress=rec), rec.lines


def _audit_item(_, item: tuple) -> tuple[str, list]:
    from .audit.run import run_audit, summary_line
    from .progress import Recorder
    library, held, folder, cfg, store, seed = item
    rec = Recorder()
    doc = run_audit(library, held, folder, cfg, store=store, seed=seed, progress=rec)
    return summary_line(doc, folder), rec.lines


def _label_and_oneshot(lib, library: Path, singles: list[Path], scenes: Path, out: Path, cfg: dict, seed: int,
                       truth: dict, say, executor, scanned, before=None) -> None:
    """Label held-out single views; then a one-shot search for a class that mining never saw, among the new scans
    ``scanned`` (pending: ingested into out/new_scans.h5 on a worker since mining began).  ``before()`` runs before
    the first line is printed (the lines of the stages before, waiting for work in the pool)."""
    from .curate.oneshot import find_similar, retrieval_scores
    from .ingest.sharded import open_store
    from .label.evaluate import evaluate_labels, record_groups
    from .label.matcher import label_captures
    from .progress import replay
    from .provenance import file_fingerprint, provenance
    from .records import write_records

    stats: dict = {}
    recs = label_captures(lib, singles, cfg, seed=seed, stats=stats, progress=say, executor=executor)
    prov = provenance(cfg, seed, {"library": file_fingerprint(library)}, command="demo")
    write_records(out / "labels.jsonl", recs, prov)
    # the overlays are pictures only: drawn on a worker while this process goes on
    overlays = _later(executor, _overlays_item, (out / "overlays", singles[:6], recs, prov))
    ev = evaluate_labels(recs, scenes / "truth_full.csv", lib, scenes / "truth_full.csv", scores=stats["scores"])
    if before is not None:
        before()
    typer.echo(f"label: {ev['n_known']} known and {ev['n_unknown']} never-mined objects in {len(singles)} single views; "
               f"known-class accuracy {ev['accuracy']:.3f} (deciding by score instead: {ev['accuracy_by_score']:.3f}), "
               f"yaw error about up median {ev['median_yaw_error_deg']:.1f}, p90 {ev['p90_yaw_error_deg']:.1f} deg "
               f"(one yaw offset per cluster: median {ev['median_yaw_error_deg_oriented']:.1f} deg), "
               f"rotation error median {ev['median_rotation_error_deg']:.1f}, p90 {ev['p90_rotation_error_deg']:.1f} deg; "
               f"unknown AUROC {ev['auroc']:.3f}, flagged: {ev['unknown_flagged']:.0%} of unknown, "
               f"{ev['known_flagged']:.0%} of known; {stats.get('objects_per_second', float('nan')):.0f} objects/s "
               f"-> {out / 'labels.jsonl'}, overlays in {out / 'overlays'}")
    depth_model = json.loads((scenes / "scenario.json").read_text()).get("depth_model", {})
    for name, sub in record_groups(recs, depth_model):
        e = evaluate_labels(sub, scenes / "truth_full.csv", lib, scenes / "truth_full.csv")
        size = (f"{len({r['capture'] for r in sub})} views" if name.endswith("depth") else
                f"{e['n_known']} known, {e['n_unknown']} never-mined objects")
        typer.echo(f"       {name} ({size}): accuracy {e['accuracy']:.3f}, "
                   f"unknown AUROC {e['auroc']:.3f}, flagged {e['unknown_flagged']:.0%} of unknown, "
                   f"{e['known_flagged']:.0%} of known")
    # one-shot: the user scans new items; one example of a class mining never saw finds the others
    replay(say, scanned.result())
    replay(say, overlays.result())
    st = open_store(out / "new_scans.h5")
    labels = np.array([truth.get(o, {}).get("label") for o in st.ids], dtype=object)
    mined_classes = {truth[o]["label"] for o in lib.members["object"] if o in truth}
    new_classes = sorted({l for l in labels if l and l not in mined_classes})
    for cls in new_classes:
        idx = np.flatnonzero(labels == cls)
        if len(idx) < 2:
            continue
        ex = int(np.random.default_rng(seed).choice(idx))
        m = find_similar(lib, st, st.ids[ex], cfg)
        others = np.array([i for i in range(len(st)) if i != ex])
        k, p_at, ap = retrieval_scores(m, others, labels[others] == cls)
        typer.echo(f"find: one example of {cls!r} (never mined) among {len(st)} new scans: "
                   f"precision at {k} {p_at:.2f}, average precision {ap:.3f}")


def demo(
    out: Annotated[Path, typer.Option("--out", "-o", help="Working folder for scenes, store, library, labels and report.")] = Path("demo_out"),
    captures: Annotated[Optional[int], typer.Option("--captures", min=2, metavar="N", show_default=False,
                                                    help="Multi-view mining captures.  [default: 12, 4 with --quick]")] = None,
    single: Annotated[Optional[int], typer.Option("--single", min=0, metavar="N", show_default=False,
                                                  help="Single-frame captures for the label stage.  "
                                                  "[default: 24, 4 with --quick]")] = None,
    frames: Annotated[Optional[int], typer.Option("--frames", min=1, metavar="N", show_default=False,
                                                  help="Frames per mining capture.  [default: 8, 4 with --quick]")] = None,
    quick: Annotated[bool, typer.Option("--quick", help=f"A small scenario at {QUICK_SIZE[0]}x{QUICK_SIZE[1]} pixels "
                                        "and the fast preset (unless --config is given): the whole job in about a "
                                        "minute, to try it out or smoke-test an install.")] = False,
    rerender: Annotated[bool, typer.Option("--rerender", help="Render the scenes again even if present.")] = False,
    config: ConfigOpt = None,
    seed: SeedOpt = 0,
    quiet: QuietOpt = False,
    verbose: VerboseOpt = False,
) -> None:
    """Run the whole job on the built-in scenario and print how well it did.

    Rendering, ingest and label spread their captures over worker processes ([scale] workers, default
    auto = the usable cores); mining runs in this process with the cores as torch threads, while the workers
    ingest the new scans; pictures, the pose-unaware baseline, export and audit run on a worker beside the
    next stage, their lines printed in the usual order.
    """
    with executor_for(config_from(config), None, None, processes=True) as ex:
        _demo(out, captures, single, frames, quick, rerender, config, seed, quiet, verbose, ex)


def _demo(out: Path, captures: int | None, single: int | None, frames: int | None, quick: bool, rerender: bool,
          config, seed: int, quiet: bool, verbose: bool, executor) -> None:
    from .ingest.pipeline import ingest_captures
    from .ingest.sharded import open_store
    from .mine.evaluate import evaluate_mining, read_truth_table
    from .mine.pipeline import mine_store
    from .progress import replay
    from .scenes.scenario import add_truth_turns, generate_scenario, held_out_setting, scene_params

    cfg = config_from(config if config is not None or not quick else "fast")
    size = QUICK_SIZE if quick else FULL_SIZE
    captures, single, frames = (given if given is not None else (q if quick else full)
                                for given, q, full in ((captures, 4, 12), (single, 4, 24), (frames, 4, 8)))
    say = reporter("demo", quiet, verbose)
    t0 = time.monotonic()
    out.mkdir(parents=True, exist_ok=True)
    scenes = out / "scenes"
    stereo = float(cfg["scenes"]["stereo_fraction"])
    params = {"captures": captures, "single": single, "frames": frames, "seed": seed, "size": list(size),
              **scene_params(cfg["scenes"])}
    if rerender or not _scenario_matches(scenes, params):
        say(f"rendering {captures} mining captures x {frames} frames and {single} single-frame captures "
            f"({stereo:.0%} with active-stereo depth)")
        generate_scenario(scenes, n_mining=captures, n_single=single, frames=frames, width=size[0], height=size[1], seed=seed,
                          family=cfg["scenes"]["family"], tumbled_fraction=cfg["scenes"]["tumbled_fraction"],
                          touching=cfg["scenes"]["touching"], stereo_fraction=stereo, progress=say, executor=executor,
                          held_out=held_out_setting(cfg["scenes"]))
        doc = json.loads((scenes / "scenario.json").read_text())
        doc["demo_params"] = params
        write_text(scenes / "scenario.json", json.dumps(doc, indent=1))
    else:
        say(f"reusing rendered scenes in {scenes}")
        if add_truth_turns(scenes):  # rendered before the truth listed turn symmetries: the layouts drawn again
            say("truth_full.csv: the turns column added (the scenario's layouts drawn again, nothing rendered)")
    scen = json.loads((scenes / "scenario.json").read_text())
    mining = [scenes / c for c in scen["mining"]]
    truth = read_truth_table(scenes / "truth_full.csv")
    t_scenes = time.monotonic() - t0

    store = out / "objects.h5"
    if store.exists():
        store.unlink()
    res = ingest_captures(mining, store, cfg, seed=seed, progress=say, executor=executor)
    t_ingest = time.monotonic() - t0 - t_scenes
    resid = [c["plane_residual_m"] * 1000 for c in res["captures"]]
    typer.echo(f"ingest: {res['objects']} objects from {len(mining)} captures, {res['frames_per_second']:.1f} frames/s, "
               f"plane residual median {np.median(resid):.2f} mm")

    singles = [scenes / c for c in scen["single"]]
    scanned = None
    if singles:
        # the one-shot search's new scans (the single views, ingested as a user would scan new items) do not
        # depend on mining: ingested on a worker while this process mines, when the pool is otherwise idle
        scans = out / "new_scans.h5"
        if scans.exists():
            scans.unlink()
        scanned = _later(executor, _scans_item, (singles, scans, cfg, seed))

    library = out / "library.h5"
    # the gallery and the member sheets are drawn on a worker of the pool while this process goes on
    lib, info = mine_store(store, library, cfg, seed=seed, progress=say,
                           pictures=executor if getattr(executor, "submit", None) else None)
    t_mine = time.monotonic() - t0 - t_scenes - t_ingest
    # from here on, work whose results are only printed or written to their own folder (the pose-unaware
    # baseline, overlays, export, audit) runs on a worker of the pool beside this process's next stage; its
    # lines are printed where they always were, in the same order
    baseline = _later(executor, _baseline_item, (store, cfg, truth, lib.n_clusters, seed))
    ev = evaluate_mining(lib, truth)
    n_classes = ev["n_classes"]

    # name each cluster from one example, as a user would after a glance at the gallery
    from .curate.names import cluster_of, name_clusters
    rng = np.random.default_rng(seed)
    right, named = 0, []
    for k in range(lib.n_clusters):
        members = [o for o, c in zip(lib.members["object"], lib.members["cluster"]) if c == k]
        if not members:
            continue
        example = str(members[rng.integers(len(members))])
        name = truth[example]["label"] if example in truth else f"item-{k}"
        named.append((example, name))
        right += sum(truth.get(o, {}).get("label") == name for o in members)
    # one library rewrite for all the names; the gallery and the member sheets with the names are drawn on a
    # worker (nothing below reads them)
    lib = name_clusters(library, named, pictures=False)
    named_clusters = sorted({cluster_of(lib, o) for o, _ in named})

    # export and audit read the named library and the store only, and write their own folders
    export = _later(executor, _export_item, (lib, store, mining, out / "export", cfg))
    held = out / "heldout.csv"
    n_held = heldout_subset(scenes / "truth_full.csv", list(lib.members["object"]), held, AUDIT_FRACTION,
                            np.random.default_rng(seed))
    audit = _later(executor, _audit_item, (library, held, out / "report", cfg, store, seed))

    pictures = None

    def mine_and_tag_lines() -> None:
        nonlocal pictures
        if info["pictures"] is not None:   # mining's pictures are drawn: now the named ones over them
            replay(say, info["pictures"].result())
        pictures = _later(executor, _pictures_item, (lib, library, named_clusters))
        base = baseline.result()
        typer.echo(f"mine: K={lib.n_clusters} (true classes {n_classes}); purity {ev['purity']:.3f}, NMI {ev['nmi']:.3f}; "
                   f"yaw error median {ev['yaw_error_median_deg']:.1f} deg, p90 {ev['yaw_error_p90_deg']:.1f} deg "
                   f"({ev['yaw_error_kind']}, modulo symmetry; one yaw offset per cluster: median "
                   f"{ev['yaw_error_median_cluster_offset_deg']:.1f}, p90 {ev['yaw_error_p90_cluster_offset_deg']:.1f} deg); "
                   f"rotation error median {ev['rotation_error_median_deg']:.1f} deg, "
                   f"p90 {ev['rotation_error_p90_deg']:.1f} deg; symmetry right for {ev['symmetry_correct']}/{ev['symmetry_total']} clusters")
        typer.echo(f"      pose-unaware baseline (scikit-learn KMeans on flattened volumes, same K): "
                   f"purity {base['purity']:.3f}, NMI {base['nmi']:.3f}")
        typer.echo(f"      gallery {out / 'gallery.png'}; assignments {out / 'assignments.csv'}")
        typer.echo(f"tag: each cluster named from one random member; the names are right for {right}/{len(lib.members['object'])} "
                   f"mined objects ({right / max(len(lib.members['object']), 1):.3f})")

    if singles:
        _label_and_oneshot(lib, library, singles, scenes, out, cfg, seed, truth, say, executor, scanned,
                           before=mine_and_tag_lines)
    else:
        mine_and_tag_lines()

    pictures.result()
    exp, lines = export.result()
    replay(say, lines)
    typer.echo(f"export: {_export_line(exp)} -> {out / 'export'}")

    # audit against a held-out subset of the truth, as a user with a few dozen hand labels would
    line, lines = audit.result()
    replay(say, lines)
    typer.echo(f"audit ({n_held} hand labels): " + line)
    typer.echo(f"done in {time.monotonic() - t0:.0f} s (scenes {t_scenes:.0f} s, ingest {t_ingest:.0f} s, mine {t_mine:.0f} s). "
               "The labels are bootstrapped, not ground truth: audit them (see the report) before training anything "
               "whose mistakes can hurt someone.")
