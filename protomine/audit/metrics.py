"""Clustering quality against held-out labels, and yaw consistency modulo a symmetry period.

Conventions:

- ``clusters`` (N,) are integer cluster ids of the labelled objects; ``labels`` (N,) are their truth
  labels (any hashable values, usually strings).  Both describe the same N objects, in the same order.
- Purity (Manning, Raghavan & Schutze 2008, ch. 16) = (1/N) sum_k max_j |cluster_k & class_j|;
  inverse purity swaps the roles of clusters and classes.
- Hungarian-matched accuracy: each cluster is matched to at most one label (one-to-one, maximising the
  number of agreeing objects, ``scipy.optimize.linear_sum_assignment``); objects in unmatched clusters
  count as wrong.
- NMI, ARI, Rand index, homogeneity / completeness / V-measure come from scikit-learn unchanged
  (NMI with the arithmetic-mean normalisation, as in Manning et al. 2008).
- Yaw in degrees.  A prototype with symmetry order n (library convention: 0 = continuous, 1 = none,
  n = n-fold) has period 360/n degrees; continuous symmetry has period ``inf`` and every yaw error is 0.
  Truth yaw is measured from the capture's reference direction, predicted yaw from the prototype's own
  frame, so the two differ by one unknown offset per cluster: truth = predicted + offset (mod period).
- Rotations (3, 3), x_world = R x_frame: truth rotations are from the labeller's (or the class's) own frame,
  predicted ones from the prototype's, so they differ by one unknown offset O per cluster, R_true ~ R_pred O;
  a symmetry group (G, 3, 3) acting on the right of R_true (``rotation_offset``, ``rotation_error_deg``) makes
  R_true g the same pose.  Errors are geodesic angles (rotation angle of A^T B) in degrees.
- Yaw error about up from rotations (``yaw_about_up_error_deg``): the residual D = R_true g (R_pred O)^T (world <-
  world, g the symmetry element nearest) is split by the swing-twist decomposition about the world up u (Dobrowolski
  2015, "Swing-twist decomposition in Clifford algebra"; common practice in animation): D = S T, T a turn about u,
  S about an axis perpendicular to u.  The yaw error is |angle of T|: the turn about the support normal that is
  left once the one per-cluster offset is removed, defined for every member whatever face it rests on (the
  twist's quaternion is the projection of D's onto (u, 1), so T is the turn about u nearest D).  For upright
  members (R = Rz(yaw) in the plane's frame) it is the plain yaw difference.
- Symmetry groups: ``None`` = every rotation about z (a continuous symmetry about the class's up); an array (G, 3, 3)
  = those rotations, or (n, G, 3, 3) = each of n objects its own (a symmetry whose axis depends on the instance's
  proportions, such as a mallet's handle); :class:`AboutZ` (reps (G, 3, 3) or (n, G, 3, 3)) = every g Rz(t), g in
  reps: a continuous symmetry about z together with turns that move up (a spool end for end).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import linear_sum_assignment
from scipy.stats import circmean
from sklearn import metrics as skm
from sklearn.metrics.cluster import contingency_matrix

from ..geometry import angle_diff_deg
from ..rotations import geodesic_deg, matrix_to_quat, yaw_matrix

__all__ = [
    "contingency", "purity_score", "inverse_purity_score", "hungarian_accuracy_score",
    "clustering_scores", "symmetry_to_period_deg", "yaw_offset_deg", "yaw_error_deg", "rotation_offset",
    "rotation_error_deg", "about_z_geodesic_deg", "twist_deg", "yaw_about_up_error_deg", "AboutZ",
]


@dataclass(frozen=True)
class AboutZ:
    """The symmetry group {g Rz(t): g in reps, every t}: a continuous symmetry about z with further turns that move up
    (reps (G, 3, 3), the identity among them, or (n, G, 3, 3) per object)."""

    reps: np.ndarray


def _check_pair(clusters, labels) -> tuple[np.ndarray, np.ndarray]:
    clusters = np.asarray(clusters)
    labels = np.asarray(labels)
    if clusters.ndim != 1 or labels.ndim != 1 or clusters.shape != labels.shape:
        raise ValueError(f"clusters and labels must be 1-D of equal length, got {clusters.shape} and {labels.shape}")
    if clusters.size == 0:
        raise ValueError("need at least one labelled object, got 0")
    return clusters, labels


def contingency(clusters, labels) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Counts table (K, L): row k = cluster ``cluster_ids[k]``, column j = label ``label_names[j]``.

    Returns (table (K, L) int64, cluster_ids (K,), label_names (L,)), both sorted ascending.
    """
    clusters, labels = _check_pair(clusters, labels)
    cluster_ids = np.unique(clusters)
    label_names = np.unique(labels)
    return contingency_matrix(clusters, labels).astype(np.int64), cluster_ids, label_names


def _purity(table: np.ndarray) -> float:
    return float(table.max(axis=1).sum() / table.sum())


def purity_score(clusters, labels) -> float:
    """Fraction of objects whose label is their cluster's majority label (higher is better)."""
    return _purity(contingency(clusters, labels)[0])


def inverse_purity_score(clusters, labels) -> float:
    """Purity with clusters and labels swapped: how whole each label class is kept."""
    return _purity(contingency(clusters, labels)[0].T)


def _hungarian_accuracy(table: np.ndarray) -> float:
    rows, cols = linear_sum_assignment(table, maximize=True)
    return float(table[rows, cols].sum() / table.sum())


def hungarian_accuracy_score(clusters, labels) -> float:
    """Accuracy after the best one-to-one matching of clusters to labels."""
    return _hungarian_accuracy(contingency(clusters, labels)[0])


def clustering_scores(clusters, labels) -> dict[str, float]:
    """All external clustering scores of (clusters (N,), labels (N,)); every value is higher-is-better."""
    clusters, labels = _check_pair(clusters, labels)
    table = contingency(clusters, labels)[0]
    h, c, v = skm.homogeneity_completeness_v_measure(labels, clusters)
    return {
        "n": int(clusters.size),
        "purity": _purity(table),
        "inverse_purity": _purity(table.T),
        "hungarian_accuracy": _hungarian_accuracy(table),
        "nmi": float(skm.normalized_mutual_info_score(labels, clusters)),
        "ari": float(skm.adjusted_rand_score(labels, clusters)),
        "rand_index": float(skm.rand_score(labels, clusters)),
        "homogeneity": float(h),
        "completeness": float(c),
        "v_measure": float(v),
    }


# --- yaw ------------------------------------------------------------------------------------

def symmetry_to_period_deg(order: int) -> float:
    """Library symmetry order (0 continuous, 1 none, n n-fold) -> yaw period in degrees (inf for 0)."""
    order = int(order)
    if order < 0:
        raise ValueError(f"symmetry order must be >= 0, got {order}")
    return math.inf if order == 0 else 360.0 / order


def yaw_offset_deg(truth_deg, pred_deg, period: float = 360.0) -> float:
    """Robust circular centre of (truth - predicted) modulo ``period``, in [0, period); 0 for infinite period.

    truth_deg, pred_deg: (M,) degrees, M >= 1.  The differences are wrapped onto a circle of
    circumference ``period`` (an n-fold symmetric prototype aligns equally at offset and offset + period).
    The centre is the circular median (the sample minimising the summed angular deviation; Fisher 1993,
    Statistical Analysis of Circular Data, sec. 2.3.2, from memory), refined by the circular mean of the
    differences within period / 8 of it, so one flipped member (a front/back confusion) does not shift
    every other member's error.
    """
    truth_deg = np.asarray(truth_deg, dtype=np.float64)
    pred_deg = np.asarray(pred_deg, dtype=np.float64)
    if truth_deg.shape != pred_deg.shape or truth_deg.ndim != 1 or truth_deg.size == 0:
        raise ValueError(f"truth_deg and pred_deg must be 1-D, non-empty and equal, got {truth_deg.shape} and {pred_deg.shape}")
    if not np.isfinite(period):
        return 0.0
    d = np.mod(truth_deg - pred_deg, period)
    cand = d if d.size <= 2000 else np.sort(d)[np.linspace(0, d.size - 1, 2000).astype(int)]
    dev = np.abs(np.mod(d[None, :] - cand[:, None] + period / 2, period) - period / 2).sum(axis=1)
    med = cand[int(np.argmin(dev))]
    near = np.abs(np.mod(d - med + period / 2, period) - period / 2) <= period / 8
    return float(np.mod(circmean(d[near], high=period, low=0.0), period))


def yaw_error_deg(truth_deg, pred_deg, offset_deg: float, period: float = 360.0) -> np.ndarray:
    """(M,) absolute yaw error in [0, period/2] after aligning predicted yaw by ``offset_deg``."""
    pred = np.asarray(pred_deg, dtype=np.float64) + offset_deg
    return angle_diff_deg(np.asarray(truth_deg, dtype=np.float64), pred, period)


# --- rotations ------------------------------------------------------------------------------

def about_z_geodesic_deg(A: np.ndarray, B: np.ndarray) -> np.ndarray:
    """Least geodesic angle (degrees) between A and B Rz(t) over every angle t, for (..., 3, 3) rotations: the
    distance modulo a continuous symmetry about z.  With M = A^T B, trace(M Rz(t)) = (M00 + M11) cos t +
    (M01 - M10) sin t + M22, largest at M22 + hypot(M00 + M11, M01 - M10); the angle is acos((trace - 1) / 2)."""
    M = np.einsum("...ji,...jk->...ik", np.asarray(A, np.float64), np.asarray(B, np.float64))
    tr = M[..., 2, 2] + np.hypot(M[..., 0, 0] + M[..., 1, 1], M[..., 0, 1] - M[..., 1, 0])
    return np.rad2deg(np.arccos(np.clip((tr - 1.0) / 2.0, -1.0, 1.0)))


def _modulo_group(A: np.ndarray, B: np.ndarray, group) -> np.ndarray:
    """Least geodesic angle between A (..., 3, 3) and B g over g in ``group`` (module docstring: None, (G, 3, 3),
    (..., G, 3, 3) matching B's last batch axis, or :class:`AboutZ`)."""
    if group is None:
        return about_z_geodesic_deg(A, B)
    if isinstance(group, AboutZ):
        return np.min(about_z_geodesic_deg(A[..., None, :, :], B[..., None, :, :] @ group.reps), axis=-1)
    return np.min(geodesic_deg(A[..., None, :, :], B[..., None, :, :] @ group), axis=-1)


def rotation_offset(R_pred: np.ndarray, R_true: np.ndarray, group: np.ndarray | None) -> np.ndarray:
    """One offset O (3, 3) with R_true ~ R_pred O: the geodesic medoid of R_pred^T R_true over members
    R_pred, R_true (n, 3, 3), distances taken modulo the symmetry group on the right (module docstring; ``None``
    for a continuous symmetry about z), each member's candidates turned by its group's elements (the medoid, not a
    mean, so a few flipped members do not move it)."""
    O = np.einsum("nji,njk->nik", R_pred, R_true)  # each defined up to O g
    if group is not None:
        # candidates O_j g, g in member j's group (identity first): with per-member groups (an axis per instance) a
        # member's own symmetry element would otherwise stay in the offset and turn every other member by twice the
        # angle between their axes
        reps = group.reps if isinstance(group, AboutZ) else group
        cand = (O[:, None] @ np.broadcast_to(reps, (len(O),) + np.shape(reps)[-3:])).reshape(-1, 3, 3)
    else:
        cand = O
    d = _modulo_group(cand[:, None], np.broadcast_to(O[None, :], (len(cand),) + O.shape), group)  # (n G, n)
    return cand[int(np.argmin(d.sum(axis=1)))]


def rotation_error_deg(R_pred: np.ndarray, R_true: np.ndarray, O: np.ndarray, group: np.ndarray | None) -> np.ndarray:
    """Errors (n,) in degrees: geodesic angle of R_pred O to R_true, the least over the symmetry group (``None``:
    every rotation about z, exactly)."""
    return _modulo_group(R_pred @ O, R_true, group)


def twist_deg(R: np.ndarray, axis: np.ndarray) -> np.ndarray:
    """Signed angle (..., ) in degrees, in (-180, 180], of the twist of rotations R (..., 3, 3) about unit
    axes (..., 3) (swing-twist decomposition R = S T): with R's quaternion (v, w), w >= 0, the twist is
    2 atan2(v . axis, w).  A rotation of exactly 180 degrees about an axis perpendicular to ``axis`` has no twist
    (0)."""
    q = matrix_to_quat(np.asarray(R, np.float64))
    a = np.asarray(axis, np.float64)
    a = a / np.maximum(np.linalg.norm(a, axis=-1, keepdims=True), 1e-12)
    t = 2.0 * np.arctan2(np.sum(q[..., :3] * a, axis=-1), q[..., 3])
    return np.rad2deg(np.where(t > np.pi, t - 2.0 * np.pi, t))


def yaw_about_up_error_deg(R_pred: np.ndarray, R_true: np.ndarray, O: np.ndarray, group: np.ndarray | None,
                           up: np.ndarray) -> np.ndarray:
    """Yaw errors (n,) in degrees, in [0, 180]: |twist about the world up (n, 3)| of R_true g (R_pred O)^T, g the
    element of ``group`` (module docstring) nearest R_pred O (least geodesic angle; ``None``: the nearest turn about
    z, a continuous symmetry, in closed form as in ``about_z_geodesic_deg``; :class:`AboutZ`: that for each rep).  R_pred, R_true (n, 3, 3) world <-
    frame; O (3, 3) the cluster's offset (``rotation_offset``)."""
    A = np.asarray(R_pred, np.float64) @ O
    B = np.asarray(R_true, np.float64)
    if group is None or isinstance(group, AboutZ):
        reps = np.eye(3)[None] if group is None else np.asarray(group.reps, np.float64)
        reps = np.broadcast_to(reps, (len(A),) + reps.shape[-3:])                     # (n, G, 3, 3)
        M = np.einsum("nji,ngjk->ngik", A, B[:, None] @ reps)                         # A^T B g per rep
        cand = reps @ yaw_matrix(np.rad2deg(np.arctan2(M[..., 0, 1] - M[..., 1, 0], M[..., 0, 0] + M[..., 1, 1])))
    else:
        cand = np.broadcast_to(np.asarray(group, np.float64), (len(A),) + np.shape(group)[-3:])
    pick = np.argmin(geodesic_deg(A[:, None], B[:, None] @ cand), axis=1)
    g = cand[np.arange(len(A)), pick]
    D = B @ g @ np.swapaxes(A, -1, -2)
    return np.abs(twist_deg(D, up))
