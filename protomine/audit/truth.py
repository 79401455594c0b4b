"""Held-out truth labels: the CSV reader and the matching of truth rows to stored objects.

The CSV (shared/spec/capture-format.md) has a header and one of two forms:

    object,label[,yaw_deg]              keyed by object id ("<capture>/<mask id>" or the tool's own id)
    capture,x,y,z,label[,yaw_deg]       keyed by a world point (metres, the capture's world frame),
                                        matched to the nearest object centre of that capture within a radius

Conventions: ``row`` numbers are 1-based file line numbers (the header is line 1), so messages point at
the line a user sees in an editor.  yaw_deg is optional per row (an empty cell means "no yaw").  Optional
columns qx,qy,qz,qw give a full truth pose: the unit quaternion (scalar last) of R with x_world = R x + t from
the labeller's own frame of the object to the capture's world frame (empty cells: no rotation); the audit
then measures pose consistency by the rotation error instead of the yaw error.
Problems with the file (a wrong header, bad numbers, empty labels, an object labelled twice) raise
:class:`protomine.errors.InputError` naming the file, row and column.  Rows naming an unknown object id or
capture, point rows with no object within the radius, and point rows whose nearest object was claimed by a
nearer row are returned as unmatched with the reason, never dropped; only when no row matches at all does
an unknown id or capture stop the audit (naming the first such row).
Columns other than the ones above are ignored, so a filled-in labelling sheet (:mod:`.plan`) is read as is.
"""
from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError

__all__ = ["TruthRow", "ObjectTable", "TruthMatch", "read_truth", "match_truth"]

OBJECT_COLUMNS = ("object", "label")
POINT_COLUMNS = ("capture", "x", "y", "z", "label")
QUATERNION = ("qx", "qy", "qz", "qw")


@dataclass(frozen=True)
class TruthRow:
    """One held-out label.  Exactly one of ``object`` or (``capture``, ``point``) is set.

    row: 1-based line number in the CSV.  point: (3,) world coordinates in metres.  yaw_deg: in [0, 360) or None.
    """

    row: int
    label: str
    object: str | None = None
    capture: str | None = None
    point: tuple[float, float, float] | None = None
    yaw_deg: float | None = None
    rotation: tuple[float, float, float, float] | None = None   # [qx, qy, qz, qw], scalar last

    @property
    def key(self) -> str:
        """How the row names its object, for listings: the id, or ``capture@(x, y, z)``."""
        if self.object is not None:
            return self.object
        return f"{self.capture}@({self.point[0]:.3f}, {self.point[1]:.3f}, {self.point[2]:.3f})"


@dataclass
class ObjectTable:
    """The stored objects truth rows can refer to.

    ids: (N,) object ids.  captures: (N,) capture folder names.  centres: (N, 3) world-space centres (metres).
    bases: optional (N, 3) base centres on the support plane.  With them a truth point is compared with the
    object's vertical axis from its base to its top (2 centre - base), so a point given at the base, the
    middle or the top of an object all match it; without them, with the centre.
    """

    ids: np.ndarray
    captures: np.ndarray
    centres: np.ndarray
    bases: np.ndarray | None = None

    def __post_init__(self) -> None:
        self.ids = np.asarray(self.ids, dtype=str)
        self.captures = np.asarray(self.captures, dtype=str)
        self.centres = np.asarray(self.centres, dtype=np.float64).reshape(-1, 3)
        n = self.ids.shape[0]
        if self.ids.ndim != 1 or self.captures.shape != (n,) or self.centres.shape != (n, 3):
            raise ValueError(f"ids (N,), captures (N,), centres (N, 3) must agree, got "
                             f"{self.ids.shape}, {self.captures.shape}, {self.centres.shape}")
        if len(set(self.ids.tolist())) != n:
            raise ValueError("object ids must be unique")
        if self.bases is not None:
            self.bases = np.asarray(self.bases, dtype=np.float64).reshape(-1, 3)
            if self.bases.shape != (n, 3):
                raise ValueError(f"bases must be (N, 3) like centres, got {self.bases.shape}")

    def distance_to(self, idx: np.ndarray, point: np.ndarray) -> np.ndarray:
        """(len(idx),) distances from ``point`` (3,) to the objects ``idx`` (axis segment or centre)."""
        p = np.asarray(point, dtype=np.float64)
        if self.bases is None:
            return np.linalg.norm(self.centres[idx] - p, axis=1)
        a = self.bases[idx]
        ab = 2.0 * (self.centres[idx] - a)                      # base -> top
        t = np.clip(np.einsum("ij,ij->i", p - a, ab) / np.maximum(np.einsum("ij,ij->i", ab, ab), 1e-12), 0.0, 1.0)
        return np.linalg.norm(a + t[:, None] * ab - p, axis=1)


@dataclass
class TruthMatch:
    """Result of matching truth rows to objects.

    object_index: (M,) index into the ObjectTable of each matched row.  rows: the M matched TruthRows, same order.
    distance_m: (M,) distance from the truth point to the matched centre (0 for id rows).
    unmatched: [(TruthRow, reason)].  unlabelled: (U,) indices of objects no truth row matched.
    """

    object_index: np.ndarray
    rows: list[TruthRow]
    distance_m: np.ndarray
    unmatched: list[tuple[TruthRow, str]] = field(default_factory=list)
    unlabelled: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.int64))


# --- reading --------------------------------------------------------------------------------

def _number(path: Path, line: int, column: str, text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise InputError(path, f"row {line}, column {column}", f"expected a number, got {text!r}") from None
    if not math.isfinite(value):
        raise InputError(path, f"row {line}, column {column}", f"expected a finite number, got {text!r}")
    return value


def object_table(store) -> ObjectTable:
    """The ObjectTable of an object store (ids, captures, centres and base centres)."""
    o = store.objects
    return ObjectTable(np.asarray(o["id"], dtype=str), np.asarray(o["capture"], dtype=str),
                       np.asarray(o["center"], dtype=np.float64), np.asarray(o["origin"], dtype=np.float64))


def read_truth(path: str | Path) -> list[TruthRow]:
    """Parse a truth CSV (either form) into TruthRows, in file order."""
    path = Path(path)
    if not path.is_file():
        raise InputError(path, None, "truth CSV not found")
    try:
        text = path.read_text(encoding="utf-8-sig")   # tolerate a spreadsheet's byte-order mark
    except UnicodeDecodeError as e:
        raise InputError(path, None, f"not UTF-8 text ({e})") from None
    reader = csv.reader(text.splitlines())
    header = next(reader, None)
    if header is None:
        raise InputError(path, "header", "empty file; expected a header 'object,label[,yaw_deg]' or 'capture,x,y,z,label[,yaw_deg]'")
    header = [h.strip() for h in header]
    return _read_rows(path, header, reader)


def _read_rows(path: Path, header: list[str], reader) -> list[TruthRow]:
    if "object" in header:
        need, by_object = OBJECT_COLUMNS, True
    elif "capture" in header:
        need, by_object = POINT_COLUMNS, False
    else:
        raise InputError(path, "header", f"expected columns 'object,label[,yaw_deg]' or 'capture,x,y,z,label[,yaw_deg]', got {','.join(header)!r}")
    missing = [c for c in need if c not in header]
    if missing:
        raise InputError(path, "header", f"missing column(s) {', '.join(missing)} (found {','.join(header)!r})")
    dup = sorted({h for h in header if header.count(h) > 1})
    if dup:
        raise InputError(path, "header", f"repeated column(s) {', '.join(dup)}")
    col = {h: i for i, h in enumerate(header)}
    rows: list[TruthRow] = []
    seen: dict[str, int] = {}
    for line, cells in enumerate(reader, start=2):
        if not cells or all(not c.strip() for c in cells):
            continue                                  # blank lines are allowed (editors add them)
        if len(cells) != len(header):
            raise InputError(path, f"row {line}", f"expected {len(header)} cells like the header, got {len(cells)}")
        cell = {h: cells[i].strip() for h, i in col.items()}
        label = cell["label"]
        if not label:
            raise InputError(path, f"row {line}, column label", "empty label (fill it in or delete the row)")
        yaw = None
        if cell.get("yaw_deg"):
            yaw = _number(path, line, "yaw_deg", cell["yaw_deg"]) % 360.0
        q = None
        if all(cell.get(c) for c in QUATERNION):
            q = tuple(_number(path, line, c, cell[c]) for c in QUATERNION)
            if not 0.5 < math.sqrt(sum(v * v for v in q)) < 1.5:
                raise InputError(path, f"row {line}, columns qx,qy,qz,qw", f"expected a unit quaternion, got {q}")
        if by_object:
            obj = cell["object"]
            if not obj:
                raise InputError(path, f"row {line}, column object", "empty object id")
            if obj in seen:
                raise InputError(path, f"row {line}, column object", f"object {obj!r} already labelled in row {seen[obj]}")
            seen[obj] = line
            rows.append(TruthRow(row=line, label=label, object=obj, yaw_deg=yaw, rotation=q))
        else:
            if not cell["capture"]:
                raise InputError(path, f"row {line}, column capture", "empty capture name")
            point = tuple(_number(path, line, c, cell[c]) for c in ("x", "y", "z"))
            rows.append(TruthRow(row=line, label=label, capture=cell["capture"], point=point, yaw_deg=yaw, rotation=q))
    return rows


# --- matching -------------------------------------------------------------------------------

def match_truth(rows: list[TruthRow], objects: ObjectTable, *, radius_m: float,
                path: str | Path | None = None) -> TruthMatch:
    """Match truth rows to objects: id rows by id, point rows to the nearest centre of their capture.

    A point row matches only within ``radius_m``; when two point rows pick the same object, the nearer
    one wins and the other is reported unmatched.  Rows naming an unknown object id or capture are
    reported unmatched; if no row matches at all, the first of them raises InputError (``path`` names the
    CSV in the message).
    """
    if not radius_m > 0:
        raise ValueError(f"radius_m must be > 0, got {radius_m}")
    return _match_truth(rows, objects, radius_m, path)


def _match_truth(rows, objects, radius_m, path) -> TruthMatch:
    index = {oid: i for i, oid in enumerate(objects.ids.tolist())}
    known_captures = set(objects.captures.tolist())
    # candidate (object index, distance) per row; point rows may still be displaced by a nearer row
    claims: dict[int, tuple[float, int]] = {}
    unmatched: list[tuple[TruthRow, str]] = []
    unknown: list[tuple[str, TruthRow, str]] = []          # (column, row, message) of unknown ids/captures
    for r, tr in enumerate(rows):
        if tr.object is not None:
            if tr.object not in index:
                why = f"unknown object id {tr.object!r} (not in the object store; {len(index)} objects known)"
                unknown.append(("object", tr, why))
                unmatched.append((tr, why))
                continue
            i, d = index[tr.object], 0.0
        else:
            if tr.capture not in known_captures:
                why = f"unknown capture {tr.capture!r} (known: {', '.join(sorted(known_captures)[:10])})"
                unknown.append(("capture", tr, why))
                unmatched.append((tr, why))
                continue
            cand = np.flatnonzero(objects.captures == tr.capture)
            dist = objects.distance_to(cand, tr.point)
            j = int(dist.argmin())
            i, d = int(cand[j]), float(dist[j])
            if d > radius_m:
                unmatched.append((tr, f"no object of capture {tr.capture!r} within {radius_m:g} m (nearest {objects.ids[i]} at {d:.3f} m)"))
                continue
        if i in claims:
            d_old, r_old = claims[i]
            loser, winner = (r, r_old) if d >= d_old else (r_old, r)
            unmatched.append((rows[loser], f"object {objects.ids[i]} already matched by nearer row {rows[winner].row}"))
            if winner == r_old:
                continue
        claims[i] = (d, r)
    if unknown and not claims:
        column, tr, why = unknown[0]
        raise InputError(path, f"row {tr.row}, column {column}",
                         f"{why}; no row of the file matches an object ({len(unknown)} unknown)")
    order = sorted(claims.items(), key=lambda kv: kv[1][1])       # keep file order
    obj_idx = np.array([i for i, _ in order], dtype=np.int64)
    unlabelled = np.setdiff1d(np.arange(objects.ids.shape[0]), obj_idx)
    return TruthMatch(
        object_index=obj_idx,
        rows=[rows[r] for _, (_, r) in order],
        distance_m=np.array([d for _, (d, _) in order], dtype=np.float64),
        unmatched=sorted(unmatched, key=lambda u: u[0].row),
        unlabelled=unlabelled,
    )
