"""The unknown cut: a split-conformal threshold on the calibrated single-view score.

A labelled view is called "unknown" when its score is below the library's cut.  The cut is chosen at mining
time, without labels, from held-out single-view scores of mined objects (each view matched against its
prototype rebuilt without its own object, ``mine.pipeline.single_view_distances``), so that at most
``alpha`` of the views of known classes are flagged:

    nonconformity a_i = 1 - score_i of the n calibration views,  r = ceil((n + 1)(1 - alpha)),
    q = the r-th smallest a_i,  a view is unknown when 1 - score > q,  i.e.  score < cut = 1 - q,

the finite-sample split-conformal quantile (Vovk, Gammerman & Shafer 2005; Angelopoulos & Bates 2021,
"A gentle introduction to conformal prediction", sec. 1): for a new view exchangeable with the calibration
views, P(flagged) <= alpha.  With n < 1/alpha - 1 views r exceeds n, q is infinite and nothing is flagged
(the cut is 0): too few views to promise the rate.  The library records ``unknown_alpha``, ``unknown_cut``
and ``unknown_calibration_views`` as attributes.
"""
from __future__ import annotations

import math

import numpy as np

from ..errors import InputError

__all__ = ["conformal_rank", "conformal_cut", "library_cut", "ATTRS"]

ATTRS = ("unknown_alpha", "unknown_cut", "unknown_calibration_views")


def conformal_rank(n: int, alpha: float) -> int:
    """r = ceil((n + 1)(1 - alpha)): the rank of the calibration nonconformity used as the quantile."""
    if not 0 < alpha < 1:
        raise ValueError(f"alpha must be in (0, 1), got {alpha}")
    if n < 0:
        raise ValueError(f"n must be >= 0, got {n}")
    # a small tolerance so that e.g. (19 + 1) x 0.95 = 19.000000000000004 is rank 19, as by hand
    return int(math.ceil((n + 1) * (1.0 - alpha) - 1e-9))


def conformal_cut(scores, alpha: float) -> float:
    """Score cut (a view is unknown when its score < cut) from calibration scores (n,) in [0, 1] of known views."""
    s = np.sort(np.asarray(scores, dtype=np.float64).ravel())
    if s.size and not np.all(np.isfinite(s)):
        raise ValueError("calibration scores must be finite")
    r = conformal_rank(s.size, alpha)
    if r > s.size:
        return 0.0
    # ascending scores s_(1..n): the r-th smallest nonconformity 1 - s is 1 - s_(n + 1 - r)
    return float(s[s.size - r])


def library_cut(library) -> float:
    """The unknown cut a library was mined with (``unknown_cut`` attribute)."""
    if "unknown_cut" not in library.attrs:
        raise InputError(library.path, "unknown_cut", "library records no unknown cut (mined before the calibrated "
                         "unknown was added); mine it again")
    return float(library.attrs["unknown_cut"])
