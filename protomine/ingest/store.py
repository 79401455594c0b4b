"""The HDF5 object store: one volume and one table row per object.

Layout (format ``protomine.store/1``; readers check the version)::

    attrs      format, conventions, grid (R, A, H), channels, config, seed, provenance
    volumes    (N, 6, R, A, H) float32, chunked per few objects, gzip
    objects/   id, capture, key (str); origin, up, center (N, 3); radius_m, height_m (N,);
               n_points, n_frames (N,)
    views/     one row per (object, frame): object (index), frame (str), bbox (M, 4) [u0, v0, u1, v1]
               (inclusive-exclusive pixel box), n_pixels
    single/    one-frame volumes of some objects (each lifted from that frame alone, with its own
               object frame), used by mining to calibrate single-view scores without labels:
               object (index), frame, volumes (Q, 6, R, A, H); camera (Q, 3): the unit direction from the view's
               object centre to its frame's camera in the view's object frame (``label.matcher.lift_frame``'s
               ``cameras``; NaN rows for views of a store written before it was kept, absent in such stores);
               size (Q, 2): the view's metric footprint radius and height (m) in its own object frame (``lift_frame``'s
               ``size_m``; NaN rows for views of a store written before it was kept, absent in such stores)
    crops/     a small thumbnail set per object: object, frame, rgb (Q, S, S, 3) uint8,
               depth (Q, S, S) uint16 millimetres, mask (Q, S, S) bool
    captures/  name, path, fingerprint, plane_normal (n, 3), plane_offset, plane_residual_m,
               plane_inlier_fraction, n_frames, n_objects, masks

Writes are atomic: a new file is built beside the old one (retained objects copied bit for bit) and
renamed into place.  Re-ingesting a capture replaces its objects.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np

from ..atomic import atomic_path, exclusive_lock, pause_point
from ..errors import InputError
from .volume import CHANNELS, Grid, matching_features

FORMAT = "protomine.store/1"
INDEX_FORMAT = "protomine.store-index/1"  # a sharded store's index (protomine.ingest.sharded)
CONVENTIONS = ("metres; world frame as in each capture; up = support-plane normal toward the cameras; "
               "yaw right-handed about up from world +x projected on the plane; volume (C, R, A, H) "
               "cylindrical, azimuth counter-clockwise")
STR = h5py.string_dtype()

OBJ_FLOAT3 = ("origin", "up", "center")
OBJ_FLOAT = ("radius_m", "height_m")
OBJ_INT = ("n_points", "n_frames")
OBJ_STR = ("id", "capture", "key")
CAP_FIELDS = ("name", "path", "fingerprint", "plane_normal", "plane_offset", "plane_residual_m",
              "plane_inlier_fraction", "n_frames", "n_objects", "masks")


@dataclass
class ObjectRecord:
    id: str
    capture: str
    key: str
    origin: np.ndarray
    up: np.ndarray
    center: np.ndarray
    radius_m: float
    height_m: float
    n_points: int
    n_frames: int
    volume: np.ndarray                      # (6, R, A, H)
    views: list[tuple[str, tuple[int, int, int, int], int]] = field(default_factory=list)  # frame, bbox, n_pixels
    crops: list[tuple[str, np.ndarray, np.ndarray, np.ndarray]] = field(default_factory=list)  # frame, rgb, depth, mask
    single_views: list[tuple[str, np.ndarray]] = field(default_factory=list)  # frame, (6, R, A, H) one-frame volume
    single_cameras: list[np.ndarray] = field(default_factory=list)  # (3,) per single view: camera direction (see single/)
    single_sizes: list[np.ndarray] = field(default_factory=list)    # (2,) per single view: radius, height m (see single/)
    single_cuts: list[bool] = field(default_factory=list)           # per single view: it cuts its object off (see single/)


@dataclass
class CaptureRecord:
    name: str
    path: str
    fingerprint: str
    plane_normal: np.ndarray
    plane_offset: float
    plane_residual_m: float
    plane_inlier_fraction: float
    n_frames: int
    n_objects: int
    masks: bool


class ObjectStore:
    """Read access to a single-file store.  Tables are loaded once; volumes are read in slices.

    A sharded store (an index and its shards) is read by :class:`protomine.ingest.sharded.ShardedObjectStore`
    with the same interface; :func:`protomine.ingest.sharded.open_store` opens either kind.
    """

    def __init__(self, path: str | Path):
        self.path = Path(path)
        if not self.path.is_file():
            raise InputError(self.path, None, "object store not found")
        try:
            with h5py.File(self.path, "r") as f:
                fmt = f.attrs.get("format")
                if fmt == INDEX_FORMAT:
                    raise InputError(self.path, "format", "this is a sharded store index: open it with "
                                     "protomine.ingest.sharded.open_store")
                if fmt != FORMAT:
                    raise InputError(self.path, "format", f"expected an object store {FORMAT!r}, got {fmt!r}")
                self.attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
                self.grid_shape = tuple(int(x) for x in f.attrs["grid"])
                self.objects = {k: _decode(f["objects"][k][()]) for k in f["objects"]}
                self.views = {k: _decode(f["views"][k][()]) for k in f["views"]}
                self.captures = {k: _decode(f["captures"][k][()]) for k in f["captures"]}
                self.crop_object = f["crops/object"][()]
                self.crop_frame = _decode(f["crops/frame"][()])
                self.single_object = f["single/object"][()]
                self.single_frame = _decode(f["single/frame"][()])
                # the single views' camera directions (None: a store written before they were kept)
                self.single_camera = f["single/camera"][()] if "camera" in f["single"] else None
                # their metric footprint radius and height (None: a store written before they were kept)
                self.single_size = f["single/size"][()] if "size" in f["single"] else None
                # whether each cuts its object off (1), does not (0), unknown (-1) (None: written before they were kept)
                self.single_cut = f["single/cut"][()].astype(np.int8) if "cut" in f["single"] else None
                n = f["volumes"].shape[0]
        except OSError as e:
            raise InputError(self.path, None, f"not a readable HDF5 object store ({e})") from None
        except KeyError as e:
            raise InputError(self.path, str(e), "object store is missing this dataset (corrupt or not a store)") from None
        if len(self.objects["id"]) != n:
            raise InputError(self.path, "volumes", f"{n} volumes but {len(self.objects['id'])} object rows")
        self._index = {oid: i for i, oid in enumerate(self.objects["id"])}

    def __len__(self) -> int:
        return len(self.objects["id"])

    @property
    def ids(self) -> list[str]:
        return list(self.objects["id"])

    @property
    def config(self) -> dict:
        return json.loads(self.attrs["config"])

    def index_of(self, object_id: str) -> int:
        if object_id not in self._index:
            raise InputError(self.path, "objects.id", f"no object {object_id!r} in this store ({len(self)} objects)")
        return self._index[object_id]

    def read_volumes(self, i0: int, i1: int) -> np.ndarray:
        """(i1 - i0, 6, R, A, H) float32."""
        with h5py.File(self.path, "r") as f:
            return f["volumes"][i0:i1]

    def read_volume_at(self, indices: np.ndarray) -> np.ndarray:
        idx = np.asarray(indices)
        order = np.argsort(idx)
        with h5py.File(self.path, "r") as f:
            vols = f["volumes"][np.sort(idx)] if len(idx) else np.zeros((0, len(CHANNELS)) + self.grid_shape, np.float32)
        out = np.empty_like(vols)
        out[order] = vols
        return out

    def source(self, cfg: dict) -> "StoreSource":
        """The store as a chunked source of matching features (the engine picks the chunk size)."""
        return StoreSource(self, cfg)

    def read_single_views(self, rows: np.ndarray | None = None) -> np.ndarray:
        """One-frame volumes (Q, 6, R, A, H) (all, or the given rows of single/)."""
        with h5py.File(self.path, "r") as f:
            d = f["single/volumes"]
            return d[()] if rows is None else d[np.sort(np.asarray(rows))]

    def crops(self, object_id: str) -> list[np.ndarray]:
        """RGB thumbnails (S, S, 3) uint8 of an object."""
        i = self.index_of(object_id)
        rows = np.flatnonzero(self.crop_object == i)
        if not len(rows):
            return []
        with h5py.File(self.path, "r") as f:
            return [f["crops/rgb"][r] for r in rows]

    def crop_masks(self, object_id: str) -> list[np.ndarray]:
        i = self.index_of(object_id)
        rows = np.flatnonzero(self.crop_object == i)
        with h5py.File(self.path, "r") as f:
            return [f["crops/mask"][r] for r in rows]

    def fingerprint(self) -> str:
        """Content fingerprint: ids, captures' fingerprints and grid (stable across rewrites)."""
        import hashlib
        h = hashlib.sha256()
        h.update(json.dumps([list(self.objects["id"]), list(self.captures["fingerprint"]), list(self.grid_shape)]).encode())
        return h.hexdigest()[:16]


class StoreSource:
    """A chunked source of matching features (X, W) for the clustering engine."""

    def __init__(self, store: ObjectStore, cfg: dict, indices: np.ndarray | None = None):
        self.store, self.cfg = store, cfg
        self.indices = np.arange(len(store)) if indices is None else np.asarray(indices)

    def __len__(self) -> int:
        return len(self.indices)

    def read(self, i0: int, i1: int) -> tuple[np.ndarray, np.ndarray]:
        idx = self.indices[i0:i1]
        contiguous = len(idx) and np.all(np.diff(idx) == 1)
        vols = self.store.read_volumes(int(idx[0]), int(idx[-1]) + 1) if contiguous else self.store.read_volume_at(idx)
        m = self.cfg["mine"]
        return matching_features(vols, free_weight=m["free_weight"], colour_weight=m["colour_weight"])


def is_index(path: str | Path) -> bool:
    """True when ``path`` is an existing sharded-store index (cheap: reads one attribute)."""
    p = Path(path)
    if not p.is_file():
        return False
    try:
        with h5py.File(p, "r") as f:
            return f.attrs.get("format") == INDEX_FORMAT
    except OSError:
        return False


def _decode(a):
    if isinstance(a, np.ndarray) and a.dtype == object:
        return np.array([x.decode() if isinstance(x, bytes) else x for x in a], dtype=object)
    return a


def write_store(path: str | Path, objects: list[ObjectRecord], captures: list[CaptureRecord], *,
                grid: Grid, provenance: dict, crop_size: int) -> dict:
    """Write (or update) the store at ``path``: objects of ``captures`` replace any earlier ones.

    Returns counts: kept, replaced, added.
    """
    path = Path(path)
    with exclusive_lock(path, timeout=30.0):
        if is_index(path):
            raise InputError(path, "format", "this is a sharded store index; update it with "
                             "protomine.ingest.sharded.ingest_sharded (the ingest command does)")
        old = ObjectStore(path) if path.exists() else None
        if old is not None and old.grid_shape != grid.shape:
            raise InputError(path, "grid", f"store was built with grid {old.grid_shape}, this run uses {grid.shape}; "
                             "use the same [volume] config or a new store")
        new_caps = {c.name for c in captures}
        keep = np.array([], dtype=int) if old is None else np.flatnonzero([c not in new_caps for c in old.objects["capture"]])
        replaced = 0 if old is None else len(old) - len(keep)
        with atomic_path(path) as tmp:
            _write(tmp, old, keep, objects, captures, grid, provenance, crop_size)
        return {"kept": int(len(keep)), "replaced": int(replaced), "added": len(objects)}


def _write(tmp: Path, old: ObjectStore | None, keep: np.ndarray, objects: list[ObjectRecord],
           captures: list[CaptureRecord], grid: Grid, provenance: dict, crop_size: int) -> None:
    R, A, H = grid.shape
    n_old, n = len(keep), len(keep) + len(objects)
    remap = {int(o): i for i, o in enumerate(keep)}
    with h5py.File(tmp, "w") as f:
        f.attrs["format"] = FORMAT
        f.attrs["conventions"] = CONVENTIONS
        f.attrs["grid"] = np.array(grid.shape)
        f.attrs["channels"] = json.dumps(CHANNELS)
        for k, v in provenance.items():
            f.attrs[k] = v
        vol_shape = (len(CHANNELS), R, A, H)
        dv = f.create_dataset("volumes", shape=(n,) + vol_shape, dtype=np.float32,
                              chunks=(max(1, min(n, 4)),) + vol_shape, compression="gzip", compression_opts=4, shuffle=True)
        # retained objects: copied chunk by chunk, bit for bit
        if n_old:
            with h5py.File(old.path, "r") as fo:
                src = fo["volumes"]
                step = 256
                for s in range(0, n_old, step):
                    idx = keep[s:s + step]
                    dv[s:s + len(idx)] = src[idx]
        for i, o in enumerate(objects):
            dv[n_old + i] = o.volume
        pause_point("mid_write")
        g = f.create_group("objects")
        for k in OBJ_STR:
            vals = ([old.objects[k][j] for j in keep] if n_old else []) + [getattr(o, k) for o in objects]
            g.create_dataset(k, data=np.array(vals, dtype=object), dtype=STR)
        for k in OBJ_FLOAT3:
            vals = np.concatenate([old.objects[k][keep] if n_old else np.zeros((0, 3)), np.array([getattr(o, k) for o in objects]).reshape(-1, 3)])
            g.create_dataset(k, data=vals.astype(np.float64))
        for k in OBJ_FLOAT + OBJ_INT:
            dt = np.float64 if k in OBJ_FLOAT else np.int64
            vals = np.concatenate([old.objects[k][keep] if n_old else np.zeros(0), np.array([getattr(o, k) for o in objects], dtype=dt)])
            g.create_dataset(k, data=vals.astype(dt))
        # views
        vo, vf, vb, vn = [], [], [], []
        if n_old:
            sel = np.isin(old.views["object"], keep)
            vo += [remap[int(x)] for x in old.views["object"][sel]]
            vf += list(old.views["frame"][sel])
            vb += list(old.views["bbox"][sel])
            vn += list(old.views["n_pixels"][sel])
        for i, o in enumerate(objects):
            for fr, bb, npx in o.views:
                vo.append(n_old + i); vf.append(fr); vb.append(bb); vn.append(npx)
        g = f.create_group("views")
        g.create_dataset("object", data=np.array(vo, dtype=np.int64))
        g.create_dataset("frame", data=np.array(vf, dtype=object), dtype=STR)
        g.create_dataset("bbox", data=np.array(vb, dtype=np.int64).reshape(-1, 4))
        g.create_dataset("n_pixels", data=np.array(vn, dtype=np.int64))
        # crops
        S = crop_size
        old_rows = np.flatnonzero(np.isin(old.crop_object, keep)) if n_old else np.zeros(0, int)
        q = len(old_rows) + sum(len(o.crops) for o in objects)
        g = f.create_group("crops")
        cr = g.create_dataset("rgb", shape=(q, S, S, 3), dtype=np.uint8, chunks=(max(1, min(q, 16)), S, S, 3) if q else None, compression="gzip" if q else None)
        cd = g.create_dataset("depth", shape=(q, S, S), dtype=np.uint16, chunks=(max(1, min(q, 16)), S, S) if q else None, compression="gzip" if q else None)
        cm = g.create_dataset("mask", shape=(q, S, S), dtype=bool, chunks=(max(1, min(q, 16)), S, S) if q else None, compression="gzip" if q else None)
        co, cf = [], []
        if len(old_rows):
            with h5py.File(old.path, "r") as fo:
                if fo["crops/rgb"].shape[1] != S:
                    raise InputError(old.path, "crops", f"store crops are {fo['crops/rgb'].shape[1]} px, this run uses {S}")
                cr[:len(old_rows)] = fo["crops/rgb"][old_rows]
                cd[:len(old_rows)] = fo["crops/depth"][old_rows]
                cm[:len(old_rows)] = fo["crops/mask"][old_rows]
            co += [remap[int(x)] for x in old.crop_object[old_rows]]
            cf += list(old.crop_frame[old_rows])
        r = len(old_rows)
        for i, o in enumerate(objects):
            for fr, rgb, dep, msk in o.crops:
                cr[r], cd[r], cm[r] = rgb, dep, msk
                co.append(n_old + i); cf.append(fr); r += 1
        g.create_dataset("object", data=np.array(co, dtype=np.int64))
        g.create_dataset("frame", data=np.array(cf, dtype=object), dtype=STR)
        # one-frame volumes
        old_rows = np.flatnonzero(np.isin(old.single_object, keep)) if n_old else np.zeros(0, int)
        q = len(old_rows) + sum(len(o.single_views) for o in objects)
        g = f.create_group("single")
        sv = g.create_dataset("volumes", shape=(q,) + vol_shape, dtype=np.float32,
                              chunks=(max(1, min(q, 4)),) + vol_shape if q else None, compression="gzip" if q else None, shuffle=bool(q))
        so, sf, sc, ss, sk = [], [], [], [], []
        if len(old_rows):
            with h5py.File(old.path, "r") as fo:
                for s0 in range(0, len(old_rows), 256):
                    rows_ = old_rows[s0:s0 + 256]
                    sv[s0:s0 + len(rows_)] = fo["single/volumes"][rows_]
            so += [remap[int(x)] for x in old.single_object[old_rows]]
            sf += list(old.single_frame[old_rows])
            sc += list(old.single_camera[old_rows]) if old.single_camera is not None else [np.full(3, np.nan)] * len(old_rows)
            old_size = getattr(old, "single_size", None)
            ss += list(old_size[old_rows]) if old_size is not None else [np.full(2, np.nan)] * len(old_rows)
            old_cut = getattr(old, "single_cut", None)
            sk += list(old_cut[old_rows]) if old_cut is not None else [-1] * len(old_rows)
        r = len(old_rows)
        for i, o in enumerate(objects):
            cams = list(o.single_cameras) + [np.full(3, np.nan)] * (len(o.single_views) - len(o.single_cameras))
            sizes = list(o.single_sizes) + [np.full(2, np.nan)] * (len(o.single_views) - len(o.single_sizes))
            cuts = [int(bool(c)) for c in o.single_cuts] + [-1] * (len(o.single_views) - len(o.single_cuts))
            for (fr, vol), cam, size, cut in zip(o.single_views, cams, sizes, cuts):
                sv[r] = vol
                sk.append(cut)
                so.append(n_old + i); sf.append(fr); sc.append(np.asarray(cam, np.float64)); r += 1
                ss.append(np.asarray(size, np.float64))
        g.create_dataset("object", data=np.array(so, dtype=np.int64))
        g.create_dataset("frame", data=np.array(sf, dtype=object), dtype=STR)
        g.create_dataset("camera", data=np.array(sc, np.float64).reshape(-1, 3))
        g.create_dataset("size", data=np.array(ss, np.float64).reshape(-1, 2))
        g.create_dataset("cut", data=np.array(sk, np.int8).reshape(-1))
        # captures table
        rows = []
        if old is not None:
            new_names = {c.name for c in captures}
            for j, name in enumerate(old.captures["name"]):
                if name not in new_names:
                    rows.append({k: old.captures[k][j] for k in CAP_FIELDS})
        rows += [c.__dict__ for c in captures]
        g = f.create_group("captures")
        for k in CAP_FIELDS:
            vals = [r_[k] for r_ in rows]
            if k in ("name", "path", "fingerprint"):
                g.create_dataset(k, data=np.array(vals, dtype=object), dtype=STR)
            elif k == "plane_normal":
                g.create_dataset(k, data=np.array(vals, dtype=np.float64).reshape(-1, 3))
            else:
                g.create_dataset(k, data=np.array(vals))
