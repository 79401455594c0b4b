"""The HDF5 prototype library: prototypes, their poses and statistics, members, names.

Layout (format ``protomine.library/2``; readers check the version; a ``protomine.library/1`` file,
written before 3-D poses, is refused with a one-line error that says to re-mine)::

    attrs        format, conventions, grid, features, scales, tilts (JSON: the up-direction grid searched,
                 ``mine.tilts.TiltGrid.to_config``), store_path, store_fingerprint, config, seed,
                 provenance (code version, inputs), unknown_alpha, unknown_cut,
                 unknown_calibration_views (the open-set cut, ``mine.openset``); optional unknown_tilt_ratios,
                 unknown_rule_cut (the other-face rule of ``[mine] unknown_ratio``, ``mine.openset``)
    prototypes/  features (K, C, R, A, H), weights (K, R, A, H) matching features and observation weights
                 in the canonical frame; volumes (K, 6, R, A, H) mean aligned store volumes (pictures);
                 symmetry (K,) 0 = continuous, 1 = none, n = n-fold; period_deg (K,) 360/n (0 = any yaw);
                 count (K,); size_median, size_p10, size_p90 (K, 2) metric footprint radius and height;
                 fused_mu, fused_sigma, single_mu, single_sigma (K,) robust location and scale of the members' log distances
                 (whole fused objects / single views) for the calibrated score; origin (K,) "mined" or
                 "one-shot"; name, name_example (K,) str ("" when unnamed);
                 aspect (K,) grid aspect z_max / rho_max of the canonical face (``mine.tilts.grid_aspect``);
                 resting faces, padded to F faces: face_up (K, F, 3) up direction in the prototype frame
                 (face 0 = +z, the canonical face), face_count (K, F) members resting on it,
                 face_symmetry (K, F) symmetry code about that up (-1 = padding); optional cell_reliability
                 (K, R, H) per-cell weights of single-view scores (``reliability``); optional
                 symmetry_rotations (K, S, 4) unit quaternions [qx, qy, qz, qw] of the prototype's symmetries
                 that move its up +z, one per direction +z is carried to, identity first (rows of zeros =
                 padding; the whole group is these times the rotations about up of ``symmetry``:
                 ``mine.symmetry.group_elements``).  A format-2 library without it (mined before it was
                 added) is read as having no such symmetries; optional single_tilt_mu, single_tilt_sigma (K,):
                 the single-view calibration of matches on a face other than the canonical one (a tilted
                 copy is resampled, so the same object fits it worse than the canonical prototype;
                 single_mu, single_sigma then calibrate the canonical face's matches only).  A library
                 without them scores every match with single_mu, single_sigma; optional view_owner,
                 view_face (M,), view_features (M, C, R, A, H), view_weights (M, R, A, H): view prototypes
                 (``pipeline.view_prototypes``, ``[mine] view_prototype_members``), the mean aligned single
                 views of the members resting on one face of a prototype, in the frame of that face; optional
                 single_view_mu, single_view_sigma, single_view_tilt_mu, single_view_tilt_sigma (K,): the
                 calibration of the lesser of the scored and the view-normalised distance (``[mine]
                 view_normalise_calibrate``, ``pipeline.view_calibration``), read with the attributes
                 unknown_view_cut (and, with ``[mine] view_normalise_ratio``, unknown_view_ratios, the sorted
                 best/second distance ratios of the held-out views, and unknown_view_ratio_cut; with ``[mine]
                 view_normalise_unseen`` also unknown_view_unseen, the sorted unseen shares of ``mine.unseen``; with
                 ``[mine] view_normalise_stretch`` unknown_view_stretch, the sorted stretches |ln fit_scale| of
                 ``openset.scale_stretch``, and with ``[mine] view_normalise_stretch_face``
                 unknown_view_stretch_canonical / unknown_view_stretch_other, those of the views decided on each
                 face kind); a
                 library without them scores as before
    members/     object (N,) str, cluster, yaw_deg, scale, fit_scale, distance, score,
                 second_cluster, second_distance, face (N,) resting face, rotation (N, 4) unit quaternion
                 [qx, qy, qz, qw] of R with x_world = R x_prototype + t (capture world frame), modulo the
                 face's symmetry

Score (see :func:`match_score`): for a distance d to prototype k,
    score = 1 - T_4((ln d - mu_k) / sigma_k)
the fraction of the prototype's own members (or single views of them) expected to fit worse than this
one, under a robust fit of their log distances (median mu_k, 1.4826 MAD sigma_k) with a Student-t
tail of 4 degrees of freedom (T_4 its CDF): single views are partial and sometimes occluded or cut by the
image border, so their log distances have heavier tails than a normal law (on the demo, the 95th
percentile of known objects' z is 2.4-3.3 where a normal law gives 1.64); t with 4 degrees of freedom
is the usual robust choice for such residuals (Lange, Little & Taylor 1989).  It is comparable across clusters, needs no labels, and
a single view is "unknown" when its score falls below the library's ``unknown_cut`` attribute, the
split-conformal cut at ``unknown_alpha`` chosen at mining time (see ``mine.openset``).
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np
from scipy.stats import t as student_t

from ..atomic import atomic_path, exclusive_lock, pause_point
from ..errors import InputError
from ..rotations import matrix_to_quat, quat_to_matrix
from .symmetry import group_elements

FORMAT = "protomine.library/2"
OLD_FORMATS = ("protomine.library/1",)
STR = h5py.string_dtype()
PROTO_ARRAYS = ("features", "weights", "volumes", "symmetry", "period_deg", "count", "size_median", "size_p10",
                "size_p90", "fused_mu", "fused_sigma", "single_mu", "single_sigma", "aspect", "face_up", "face_count",
                "face_symmetry")
PROTO_STR = ("origin", "name", "name_example")
PROTO_OPTIONAL = ("cell_reliability",     # (K, R, H) single-view cell weights (``reliability``); libraries before it have none
                  "symmetry_rotations",   # (K, S, 4) symmetries that move up (``symmetry.tilt_symmetries``); none before it
                  "single_tilt_mu",       # (K,) single-view calibration of matches on another face; none before it
                  "single_tilt_sigma",
                  "view_owner",           # (M,) view prototypes (``pipeline.view_prototypes``): prototype of each,
                  "view_face",            # (M,) its resting face,
                  "view_features",        # (M, C, R, A, H), (M, R, A, H) mean aligned single views; none when off
                  "view_weights",
                  # (K,) each: the single-view calibration of min(scored distance, view-normalised distance), canonical
                  # face and other faces (``pipeline.view_calibration``, ``[mine] view_normalise_calibrate``); none when off
                  "single_view_mu", "single_view_sigma", "single_view_tilt_mu", "single_view_tilt_sigma")
VIEW_CALIBRATION_FIELDS = ("single_view_mu", "single_view_sigma", "single_view_tilt_mu", "single_view_tilt_sigma")
MEMBER_FIELDS = ("object", "cluster", "yaw_deg", "scale", "fit_scale", "distance", "score", "second_cluster", "second_distance",
                 "face", "rotation")


SCORE_DOF = 4.0


def match_score(distance: np.ndarray, mu: np.ndarray, sigma: np.ndarray, eps: float = 1e-12) -> np.ndarray:
    """Calibrated score in [0, 1] (higher = more confident): 1 - T_4((ln d - mu) / sigma)."""
    z = (np.log(np.maximum(distance, eps)) - mu) / np.maximum(sigma, 1e-6)
    return student_t.sf(z, SCORE_DOF)


def log_distance_fit(d: np.ndarray, *, min_sigma: float = 0.05) -> tuple[float, float]:
    """(mu, sigma) of log distances (robust: median and 1.4826 x MAD)."""
    ld = np.log(np.maximum(np.asarray(d, dtype=np.float64), 1e-12))
    if len(ld) == 0:
        return float("nan"), float("nan")
    mu = float(np.median(ld))
    sig = 1.4826 * float(np.median(np.abs(ld - mu))) if len(ld) > 2 else 0.0
    return mu, max(sig, min_sigma)


@dataclass
class Library:
    prototypes: dict                    # name -> array (see module docstring)
    members: dict                       # name -> array
    attrs: dict = field(default_factory=dict)
    path: Path | None = None

    @property
    def n_clusters(self) -> int:
        return int(len(self.prototypes["count"]))

    @property
    def names(self) -> dict[int, str]:
        return {k: str(n) for k, n in enumerate(self.prototypes["name"]) if n}

    def display_name(self, k: int | None) -> str:
        if k is None or k < 0:
            return "unknown"
        n = self.prototypes["name"][k]
        return str(n) if n else f"cluster-{k}"

    @property
    def config(self) -> dict:
        return json.loads(self.attrs.get("config", "{}"))

    @property
    def scales(self) -> list[float]:
        return list(json.loads(self.attrs["scales"]))

    @property
    def tilt_config(self) -> dict:
        """The up-direction grid the library was mined with (``mine.tilts.TiltGrid.to_config``)."""
        return json.loads(self.attrs.get("tilts", '{"nsides": [0]}'))

    def face_period_deg(self, cluster: np.ndarray, face: np.ndarray) -> np.ndarray:
        """Yaw period (degrees, 0 = continuous) of the given (cluster, face) pairs."""
        code = np.asarray(self.prototypes["face_symmetry"])[np.asarray(cluster), np.asarray(face)]
        return np.where(code == 0, 0.0, 360.0 / np.maximum(code, 1))

    def symmetry_group(self, k: int) -> np.ndarray:
        """Prototype k's rotational symmetry group (G, 3, 3) in its canonical frame: the symmetries that move up
        (``symmetry_rotations``; identity only when the library has none) times those about up (``symmetry``)."""
        q = self.prototypes.get("symmetry_rotations")
        reps = np.eye(3)[None] if q is None else quat_to_matrix_padded(np.asarray(q)[k])
        return group_elements(reps, int(self.prototypes["symmetry"][k]))

    @property
    def store_path(self) -> str:
        return str(self.attrs.get("store_path", ""))

    def member_index(self, object_id: str) -> int:
        hits = np.flatnonzero(self.members["object"] == object_id)
        if not len(hits):
            raise InputError(self.path, "members.object", f"no object {object_id!r} among the library's {len(self.members['object'])} members")
        return int(hits[0])

    def score(self, distance: np.ndarray, cluster: np.ndarray, *, single_view: bool,
              upright: np.ndarray | None = None, view_normalised: bool = False) -> np.ndarray:
        """Calibrated score of distances to prototypes ``cluster`` (broadcast together); single views matched
        on another face than the canonical one (``upright`` False, broadcast too) take the library's
        single_tilt_mu, single_tilt_sigma when it has them.  ``view_normalised``: the calibration of the lesser of
        the scored and the view-normalised distance (``VIEW_CALIBRATION_FIELDS``; the library must have them)."""
        if view_normalised:
            p = self.prototypes
            up = np.ones((), bool) if upright is None else np.asarray(upright, bool)
            mu = np.where(up, np.asarray(p["single_view_mu"])[cluster], np.asarray(p["single_view_tilt_mu"])[cluster])
            sg = np.where(up, np.asarray(p["single_view_sigma"])[cluster], np.asarray(p["single_view_tilt_sigma"])[cluster])
            return match_score(distance, mu, sg)
        mu = self.prototypes["single_mu" if single_view else "fused_mu"][cluster]
        sg = self.prototypes["single_sigma" if single_view else "fused_sigma"][cluster]
        if single_view and upright is not None and "single_tilt_mu" in self.prototypes:
            mu = np.where(upright, mu, np.asarray(self.prototypes["single_tilt_mu"])[cluster])
            sg = np.where(upright, sg, np.asarray(self.prototypes["single_tilt_sigma"])[cluster])
        return match_score(distance, mu, sg)


def read_library(path: str | Path) -> Library:
    path = Path(path)
    if not path.is_file():
        raise InputError(path, None, "library not found")
    try:
        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
            if fmt in OLD_FORMATS:
                raise InputError(path, "format", f"library written before 3-D poses ({fmt}); re-mine the store with "
                                 "`protomine mine` to get rotations and resting faces")
            if fmt != FORMAT:
                raise InputError(path, "format", f"expected a prototype library {FORMAT!r}, got {fmt!r}")
            attrs = {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f.attrs.items()}
            protos = {k: _dec(f["prototypes"][k][()]) for k in f["prototypes"]}
            members = {k: _dec(f["members"][k][()]) for k in f["members"]}
    except OSError as e:
        raise InputError(path, None, f"not a readable HDF5 library ({e})") from None
    except KeyError as e:
        raise InputError(path, str(e), "library is missing this dataset (corrupt or not a library)") from None
    missing = [k for k in PROTO_ARRAYS + PROTO_STR if k not in protos] + [k for k in MEMBER_FIELDS if k not in members]
    if missing:
        raise InputError(path, "prototypes", f"library is missing {missing}")
    return Library(protos, members, attrs, path)


def quat_to_matrix_padded(q: np.ndarray) -> np.ndarray:
    """Quaternions (S, 4) with rows of zeros as padding -> rotations (S', 3, 3) of the non-padding rows."""
    q = np.asarray(q, np.float64).reshape(-1, 4)
    return quat_to_matrix(q[np.linalg.norm(q, axis=1) > 0.5])


def pad_quaternions(reps: list[np.ndarray]) -> np.ndarray:
    """Per-prototype rotation lists [(S_k, 3, 3)] -> (K, S, 4) quaternions, rows of zeros as padding."""
    S = max((len(r) for r in reps), default=1)
    out = np.zeros((len(reps), S, 4))
    for k, r in enumerate(reps):
        out[k, :len(r)] = matrix_to_quat(np.asarray(r, np.float64).reshape(-1, 3, 3))
    return out


def _dec(a):
    if isinstance(a, np.ndarray) and a.dtype == object:
        return np.array([x.decode() if isinstance(x, bytes) else x for x in a], dtype=object)
    return a


def write_library(path: str | Path, lib: Library) -> None:
    """Write atomically (temporary file + rename), holding the writer lock."""
    path = Path(path)
    with exclusive_lock(path, timeout=30.0), atomic_path(path) as tmp:
        with h5py.File(tmp, "w") as f:
            f.attrs["format"] = FORMAT
            for k, v in lib.attrs.items():
                if k != "format":
                    f.attrs[k] = v
            g = f.create_group("prototypes")
            for k in PROTO_ARRAYS + tuple(k for k in PROTO_OPTIONAL if k in lib.prototypes):
                a = np.asarray(lib.prototypes[k])
                big = a.ndim >= 4
                g.create_dataset(k, data=a, compression="gzip" if big else None,
                                 chunks=(1,) + a.shape[1:] if big and len(a) else None)
            for k in PROTO_STR:
                g.create_dataset(k, data=np.array([str(x) for x in lib.prototypes[k]], dtype=object), dtype=STR)
            pause_point("mid_write")
            g = f.create_group("members")
            for k in MEMBER_FIELDS:
                a = lib.members[k]
                if k == "object":
                    g.create_dataset(k, data=np.array([str(x) for x in a], dtype=object), dtype=STR)
                else:
                    g.create_dataset(k, data=np.asarray(a))
    lib.path = path


def reduce_yaw(yaw: np.ndarray, period: np.ndarray) -> np.ndarray:
    """Yaw modulo the period (0 -> 0)."""
    p = np.asarray(period, dtype=np.float64)
    return np.where(p > 0, np.mod(yaw, np.where(p > 0, p, 1.0)), 0.0)
