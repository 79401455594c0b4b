"""Ingest as a map over captures: each task lifts a group of captures and writes its own store shard.

The captures are split, in the order given, into contiguous groups of at most ``max_captures_per_shard``
(and about ``len(captures) / n_workers`` when that is smaller); each group is one task on the executor,
which runs :func:`protomine.ingest.pipeline.ingest_captures` into a fresh shard file
``<store>.shards/<run>-<nnnnn>.h5``.  Only capture paths go out and small summaries come back.  The
caller then writes the index (:mod:`protomine.scale.shards`) under the store's writer lock: the previous
index's live captures that were not re-ingested, then the new shards in group order.  Shards left without
a live capture are deleted afterwards.  Per-capture randomness is ``capture_rng(seed, name)``, so objects,
their order and their volumes equal a single-file ingest of the same captures in the same order.

Workers must see the capture folders and the store's folder at the same paths (a shared file system).
Memory per task is bounded by one group of captures.
"""
from __future__ import annotations

import math
import secrets
import time
from pathlib import Path
from typing import Callable

from ..atomic import clean_stale_temporaries, exclusive_lock, pause_point
from ..errors import InputError
from ..progress import bar
from ..provenance import provenance
from ..scale.executor import Executor
from ..scale.shards import is_index, read_index, shard_folder, write_index
from .store import ObjectStore
from .volume import Grid

MAX_CAPTURES_PER_SHARD = 32


def capture_groups(n: int, n_workers: int, max_per_group: int = MAX_CAPTURES_PER_SHARD) -> list[tuple[int, int]]:
    """Contiguous [i0, i1) groups of ``n`` captures: about n / n_workers each, at most ``max_per_group``."""
    size = max(1, min(max_per_group, math.ceil(n / max(1, n_workers))))
    return [(i0, min(n, i0 + size)) for i0 in range(0, n, size)]


def _ingest_group(shared: tuple, item: tuple) -> dict:
    """Worker: ingest one group of captures into its shard; returns the pipeline's summary."""
    from .pipeline import ingest_captures
    cfg, seed, use_masks, keep_going = shared
    paths, shard = item
    Path(shard).parent.mkdir(parents=True, exist_ok=True)
    res = ingest_captures([Path(p) for p in paths], shard, cfg, seed=seed, use_masks=use_masks, keep_going=keep_going)
    return res


def ingest_sharded(captures: list[str | Path], store: str | Path, cfg: dict, *, executor: Executor, seed: int = 0,
                   use_masks: bool = True, max_captures_per_shard: int = MAX_CAPTURES_PER_SHARD,
                   progress: Callable[[str], None] | None = None, keep_going: bool = False) -> dict:
    """Ingest capture folders into the sharded store indexed at ``store`` (created or updated).

    Returns the summary of :func:`protomine.ingest.pipeline.ingest_captures` (captures, objects, frames,
    seconds, frames_per_second, store counts, skipped) plus ``shards`` (number of shards written).
    keep_going: as in ``ingest_captures``; a group whose captures were all skipped writes no shard.
    """
    store = Path(store)
    names = [Path(c).name for c in captures]
    if len(set(names)) != len(names):
        dup = sorted({n for n in names if names.count(n) > 1})
        raise InputError(None, "captures", f"capture folder names must be unique (they prefix object ids), got duplicates {dup}")
    grid = Grid.from_config(cfg)
    if store.exists():
        if not is_index(store):
            raise InputError(store, "format", "this is a single-file store; a distributed ingest writes a sharded "
                             "store: give a new --store path (or ingest without --scheduler/--workers)")
        old = ObjectStore(store)
        if old.grid_shape != grid.shape:
            raise InputError(store, "grid", f"store was built with grid {old.grid_shape}, this run uses {grid.shape}; "
                             "use the same [volume] config or a new store")
    folder = shard_folder(store)
    folder.mkdir(parents=True, exist_ok=True)
    clean_stale_temporaries(folder)
    run = secrets.token_hex(4)  # shard names only; contents do not depend on it
    groups = capture_groups(len(captures), executor.n_workers, max_captures_per_shard)
    items = [([str(Path(c).resolve()) for c in captures[i0:i1]], str(folder / f"{run}-{g:05d}.h5"))
             for g, (i0, i1) in enumerate(groups)]
    if progress:
        progress(f"{len(captures)} captures in {len(groups)} shards on {executor.describe()}")
    t0 = time.monotonic()
    with bar(progress, "ingest", total=len(items), unit="shards") as b:
        results = executor.map(_ingest_group, items, shared=(cfg, seed, use_masks, keep_going))
        b.advance(len(items))
    elapsed = time.monotonic() - t0
    pause_point("inputs_read")
    # groups whose captures were all skipped (keep_going) wrote no shard; skipped captures are not live
    done = {c["capture"] for r in results for c in r["captures"]}
    items = [(paths, shard) for (paths, shard), r in zip(items, results) if r["captures"]]
    names = [n for n in names if n in done]
    skipped = [s for r in results for s in r.get("skipped", [])]
    if not items:
        return {"captures": [], "objects": 0, "frames": 0, "seconds": elapsed, "frames_per_second": 0.0,
                "shards": 0, "skipped": skipped, "store": {"kept": 0, "replaced": 0, "added": 0}}
    new_rel = [Path(shard).name for _, shard in items]
    new_names = set(names)
    with exclusive_lock(store, timeout=30.0):
        # re-read under the lock: another ingest may have updated the index meanwhile
        old_rel, old_live, _ = read_index(store) if store.exists() else ([], [], {})
        kept = [(s, c) for s, c in old_live if c not in new_names]
        used = sorted({s for s, _ in kept})
        renum = {s: i for i, s in enumerate(used)}
        shards = [old_rel[s] for s in used]
        live = [(renum[s], c) for s, c in kept]
        for g, rel in enumerate(new_rel):
            shards.append(f"{folder.name}/{rel}")
            live += [(len(shards) - 1, Path(p).name) for p in items[g][0] if Path(p).name in done]
        fingerprints = {}
        for sh in shards:
            st = ObjectStore(store.parent / sh)
            fingerprints.update(dict(zip(st.captures["name"], st.captures["fingerprint"])))
        live_caps = {c for _, c in live}
        prov = provenance(cfg, seed, {c: fingerprints[c] for c in sorted(live_caps)}, command="ingest")
        n_kept = _count_live(store, old_rel, kept)
        n_replaced = _count_live(store, old_rel, [(s, c) for s, c in old_live if c in new_names])
        write_index(store, shards, live, grid=grid.shape, provenance=prov)
        dead = set(old_rel) - set(shards)
    for rel in sorted(dead):
        (store.parent / rel).unlink(missing_ok=True)
        (store.parent / (rel + ".lock")).unlink(missing_ok=True)
    per_capture = [c for r in results for c in r["captures"]]
    n_frames = sum(r["frames"] for r in results)
    added = sum(r["objects"] for r in results)
    return {"captures": per_capture, "objects": added, "frames": n_frames, "seconds": elapsed,
            "frames_per_second": n_frames / max(elapsed, 1e-9), "shards": len(items),
            "skipped": skipped,
            "store": {"kept": n_kept, "replaced": n_replaced, "added": added}}


def _count_live(store: Path, old_rel: list[str], rows: list[tuple[int, str]]) -> int:
    """Objects of the given live (shard, capture) rows of the previous index."""
    n = 0
    for s in sorted({s for s, _ in rows}):
        st = ObjectStore(store.parent / old_rel[s])
        caps = {c for s_, c in rows if s_ == s}
        n += int(sum(c in caps for c in st.objects["capture"]))
    return n
