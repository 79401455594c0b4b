"""The sharded object store: HDF5 shards (each an ordinary ``protomine.store/1`` file) and a small index.

Layout (format ``protomine.store-index/1``; readers check the version)::

    <store>.h5                 the index (HDF5, small): attrs format, grid, conventions, channels, provenance
        shards/path            (M,) str, shard file names relative to the index's folder
        live/shard, live/capture   (L,) rows (shard number, capture name): the captures whose objects in that
                               shard are current; a re-ingested capture moves to its new shard, so the old
                               shard's copy is simply no longer listed
    <store>.h5.shards/<run>-<nnnnn>.h5   the shards, one per group of captures, written by the workers

:class:`ShardedObjectStore` reads an index exactly like :class:`protomine.ingest.store.ObjectStore` reads a
single file (:func:`open_store` returns one when ``path`` is an index): the tables are the shards' live
rows concatenated in index order (shard, then row), with object indices in ``views``, ``crops`` and ``single``
renumbered to that global order, and volumes, one-frame volumes and crops are read from the shard that
holds them.  Ingesting the same captures in the same order therefore gives the same tables and volumes as
a single-file store.

Writing (:func:`ingest_sharded`): ingest as a map over captures, each task lifting a group of captures into
its own shard.  The captures are split, in the order given, into contiguous groups of at most
``max_captures_per_shard`` (and about ``len(captures) / n_workers`` when that is smaller); each group is one
task on the executor, which runs :func:`protomine.ingest.pipeline.ingest_captures` into a fresh shard file
``<store>.shards/<run>-<nnnnn>.h5``.  Only capture paths go out and small summaries come back.  The caller
then writes the index under the store's writer lock: the previous index's live captures that were not
re-ingested, then the new shards in group order.  Shards left without a live capture are deleted
afterwards.  Per-capture randomness is ``capture_rng(seed, name)``, so objects, their order and their
volumes equal a single-file ingest of the same captures in the same order.

Workers must see the capture folders and the store's folder at the same paths (a shared file system).
Memory per task is bounded by one group of captures.

:func:`open_store` opens either kind of store: a single file or an index.
"""
from __future__ import annotations

import json
import math
import secrets
import time
from pathlib import Path
from typing import Callable

import h5py
import numpy as np

from ..atomic import atomic_path, clean_stale_temporaries, exclusive_lock, pause_point
from ..errors import InputError
from ..progress import bar
from ..provenance import provenance
from ..scale.executor import Executor
from .pipeline import ingest_captures, unique_capture_names
from .store import CONVENTIONS, INDEX_FORMAT, STR, ObjectStore, _decode, is_index
from .volume import CHANNELS, Grid


def open_store(path: str | Path) -> ObjectStore:
    """The store at ``path``: a :class:`ShardedObjectStore` when it is an index, else an :class:`ObjectStore`."""
    return ShardedObjectStore(path) if is_index(path) else ObjectStore(path)


def shard_folder(index_path: str | Path) -> Path:
    p = Path(index_path)
    return p.with_name(p.name + ".shards")


def read_index(path: str | Path) -> tuple[list[str], list[tuple[int, str]], dict]:
    """Shard paths (relative), live (shard, capture) rows and the index attributes."""
    path = Path(path)
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("format") != INDEX_FORMAT:
                raise InputError(path, "format", f"expected a sharded store index {INDEX_FORMAT!r}, got {f.attrs.get('format')!r}")
            attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
            shards = [str(s) for s in _decode(f["shards/path"][()])]
            live = list(zip((int(s) for s in f["live/shard"][()]), (str(c) for c in _decode(f["live/capture"][()]))))
    except OSError as e:
        raise InputError(path, None, f"not a readable HDF5 store index ({e})") from None
    except KeyError as e:
        raise InputError(path, str(e), "store index is missing this dataset (corrupt?)") from None
    for s, _ in live:
        if not 0 <= s < len(shards):
            raise InputError(path, "live/shard", f"shard number {s} out of range (index lists {len(shards)} shards)")
    return shards, live, attrs


def write_index(path: str | Path, shards: list[str], live: list[tuple[int, str]], *, grid: tuple[int, int, int],
                provenance: dict) -> None:
    """Write the index atomically (callers hold the store's writer lock)."""
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["format"] = INDEX_FORMAT
            f.attrs["conventions"] = CONVENTIONS
            f.attrs["grid"] = np.array(grid)
            f.attrs["channels"] = json.dumps(CHANNELS)
            for k, v in provenance.items():
                f.attrs[k] = v
            f.create_dataset("shards/path", data=np.array(shards, dtype=object), dtype=STR)
            f.create_dataset("live/shard", data=np.array([s for s, _ in live], dtype=np.int64))
            f.create_dataset("live/capture", data=np.array([c for _, c in live], dtype=object), dtype=STR)


def _concat(parts: list[np.ndarray], like: np.ndarray | None = None) -> np.ndarray:
    if parts:
        return np.concatenate(parts)
    return np.zeros(0) if like is None else like[:0]


class ShardedObjectStore(ObjectStore):
    """Read access to a sharded store with the :class:`ObjectStore` interface (module docstring)."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        if not self.path.is_file():
            raise InputError(self.path, None, "object store not found")
        rel, live, self.attrs = read_index(self.path)
        self.grid_shape = tuple(int(x) for x in self.attrs["grid"])
        self.shards = [ObjectStore(self.path.parent / r) for r in rel]
        live_of = [{c for s, c in live if s == j} for j in range(len(rel))]
        obj, views, caps = {}, {}, {}
        crop_o, crop_f, crop_loc = [], [], []
        sing_o, sing_f, sing_loc, sing_c, sing_s, sing_k = [], [], [], [], [], []
        shard_of, local = [], []
        n = 0
        for j, sh in enumerate(self.shards):
            if sh.grid_shape != self.grid_shape:
                raise InputError(sh.path, "grid", f"shard grid {sh.grid_shape} differs from the index's {self.grid_shape}")
            keep = np.flatnonzero(np.isin(sh.objects["capture"], list(live_of[j])))
            remap = np.full(len(sh), -1, np.int64)
            remap[keep] = n + np.arange(len(keep))
            for k, v in sh.objects.items():
                obj.setdefault(k, []).append(v[keep])
            vsel = np.flatnonzero(remap[sh.views["object"]] >= 0) if len(sh.views["object"]) else np.zeros(0, int)
            for k, v in sh.views.items():
                views.setdefault(k, []).append(remap[v[vsel]] if k == "object" else v[vsel])
            csel = np.flatnonzero(np.isin(sh.captures["name"], list(live_of[j])))
            for k, v in sh.captures.items():
                caps.setdefault(k, []).append(v[csel])
            rows = np.flatnonzero(remap[sh.crop_object] >= 0) if len(sh.crop_object) else np.zeros(0, int)
            crop_o.append(remap[sh.crop_object[rows]]); crop_f.append(sh.crop_frame[rows])
            crop_loc.append(np.stack([np.full(len(rows), j), rows], 1))
            rows = np.flatnonzero(remap[sh.single_object] >= 0) if len(sh.single_object) else np.zeros(0, int)
            sing_o.append(remap[sh.single_object[rows]]); sing_f.append(sh.single_frame[rows])
            sing_c.append(sh.single_camera[rows] if sh.single_camera is not None
                          else np.full((len(rows), 3), np.nan))
            sing_s.append(sh.single_size[rows] if getattr(sh, "single_size", None) is not None
                          else np.full((len(rows), 2), np.nan))
            sing_k.append(sh.single_cut[rows] if getattr(sh, "single_cut", None) is not None
                          else np.full(len(rows), -1, np.int8))
            sing_loc.append(np.stack([np.full(len(rows), j), rows], 1))
            shard_of.append(np.full(len(keep), j, np.int64)); local.append(keep)
            n += len(keep)
        self.objects = {k: _concat(v) for k, v in obj.items()}
        self.views = {k: _concat(v) for k, v in views.items()}
        self.captures = {k: _concat(v) for k, v in caps.items()}
        self.crop_object, self.crop_frame = _concat(crop_o).astype(np.int64), _concat(crop_f)
        self.single_object, self.single_frame = _concat(sing_o).astype(np.int64), _concat(sing_f)
        self._crop_loc = _concat(crop_loc).reshape(-1, 2).astype(np.int64)
        self.single_camera = _concat(sing_c).reshape(-1, 3).astype(np.float64) if sing_c else None
        # the single views' metric sizes (NaN rows: a shard written before they were kept)
        self.single_size = _concat(sing_s).reshape(-1, 2).astype(np.float64) if sing_s else None
        # whether each cuts its object off (1 / 0; -1: a shard written before it was kept)
        self.single_cut = _concat(sing_k).reshape(-1).astype(np.int8) if sing_k else None
        self._single_loc = _concat(sing_loc).reshape(-1, 2).astype(np.int64)
        self._shard_of = _concat(shard_of).astype(np.int64)
        self._local = _concat(local).astype(np.int64)
        if not self.shards:
            self.objects = {"id": np.zeros(0, object), "capture": np.zeros(0, object)}
        self._index = {oid: i for i, oid in enumerate(self.objects["id"])}

    def _by_shard(self, shard_of: np.ndarray, local: np.ndarray, read, empty_shape: tuple) -> np.ndarray:
        """Rows read shard by shard with ``read(shard, local_rows)``, put back in the requested order."""
        out = None
        for j in np.unique(shard_of):
            sel = np.flatnonzero(shard_of == j)
            part = read(self.shards[int(j)], local[sel])
            if out is None:
                out = np.empty((len(shard_of),) + part.shape[1:], part.dtype)
            out[sel] = part
        return np.zeros((0,) + empty_shape, np.float32) if out is None else out

    def read_volumes(self, i0: int, i1: int) -> np.ndarray:
        """(i1 - i0, 6, R, A, H) float32."""
        return self.read_volume_at(np.arange(i0, i1))

    def read_volume_at(self, indices: np.ndarray) -> np.ndarray:
        idx = np.asarray(indices, np.int64)
        return self._by_shard(self._shard_of[idx], self._local[idx], lambda sh, r: sh.read_volume_at(r),
                              (len(CHANNELS),) + self.grid_shape)

    def read_single_views(self, rows: np.ndarray | None = None) -> np.ndarray:
        """One-frame volumes (Q, 6, R, A, H) (all, or the given rows of single/, in sorted row order)."""
        rows = np.arange(len(self.single_object)) if rows is None else np.sort(np.asarray(rows, np.int64))
        loc = self._single_loc[rows]
        return self._by_shard(loc[:, 0], loc[:, 1], lambda sh, r: _sorted_read(sh.read_single_views, r),
                              (len(CHANNELS),) + self.grid_shape)

    def crops(self, object_id: str) -> list[np.ndarray]:
        i = self.index_of(object_id)
        return self.shards[int(self._shard_of[i])].crops(object_id)

    def crop_masks(self, object_id: str) -> list[np.ndarray]:
        i = self.index_of(object_id)
        return self.shards[int(self._shard_of[i])].crop_masks(object_id)


def _sorted_read(read, rows: np.ndarray) -> np.ndarray:
    """``read`` returns rows in sorted order; give them back in the order of ``rows``."""
    order = np.argsort(rows, kind="stable")
    got = read(rows)
    out = np.empty_like(got)
    out[order] = got
    return out


MAX_CAPTURES_PER_SHARD = 32


def capture_groups(n: int, n_workers: int, max_per_group: int = MAX_CAPTURES_PER_SHARD) -> list[tuple[int, int]]:
    """Contiguous [i0, i1) groups of ``n`` captures: about n / n_workers each, at most ``max_per_group``."""
    size = max(1, min(max_per_group, math.ceil(n / max(1, n_workers))))
    return [(i0, min(n, i0 + size)) for i0 in range(0, n, size)]


def _ingest_group(shared: tuple, item: tuple) -> dict:
    """Worker: ingest one group of captures into its shard; returns the pipeline's summary."""
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
    names = unique_capture_names(captures)
    grid = Grid.from_config(cfg)
    if store.exists():
        if not is_index(store):
            raise InputError(store, "format", "this is a single-file store; a distributed ingest writes a sharded "
                             "store: give a new --store path (or ingest without --scheduler/--workers)")
        old = ShardedObjectStore(store)
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
