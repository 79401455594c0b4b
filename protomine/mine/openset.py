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

__all__ = ["conformal_rank", "conformal_cut", "library_cut", "ATTRS", "fisher_combine", "fisher_combine_many",
           "loo_ratio_pvalues", "mondrian_loo_pvalues", "ratio_pvalue", "scale_stretch", "member_pvalues"]

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


def shrunk_stratum_cut(stratum_cut: float, n_views: int, pooled_cut: float, pseudo_views: float) -> float:
    """A stratum's split-conformal cut drawn toward the pooled one by its sample size (``[mine] unknown_cut_shrink``):
    (n c_s + n0 c) / (n + n0), the credibility-weighted mean (Buhlmann 1967: weight n / (n + n0) on a group's own
    estimate, n0 the prior's weight in views).  A stratum of n views sets its 5% cut by its ceil((n + 1) 0.05)-th
    smallest value, a handful of views for the 60-70 held-out views that cut their object off: with n0 views of the
    pooled cut behind it, a few misdecided views cannot carry it to 0, and a large stratum keeps its own cut.
    ``pseudo_views`` 0: the stratum's own cut."""
    n, n0 = float(n_views), float(pseudo_views)
    if n0 <= 0:
        return float(stratum_cut)
    return float((n * stratum_cut + n0 * pooled_cut) / (n + n0))


def library_cut(library) -> float:
    """The unknown cut a library was mined with (``unknown_cut`` attribute)."""
    if "unknown_cut" not in library.attrs:
        raise InputError(library.path, "unknown_cut", "library records no unknown cut (mined before the calibrated "
                         "unknown was added); mine it again")
    return float(library.attrs["unknown_cut"])


# --- the other-face rule (``[mine] unknown_ratio``) --------------------------------------------------------------
#
# A view matched on another face than its prototype's canonical one is matched against the best of many tilted
# copies, which fit the prototype's own members loosely; a never-mined object then fits the best copy about as
# well as a known object does, and its calibrated score looks typical.  What tells them apart there is how much
# nearer the best prototype is than the next one: for a known object one prototype stands out, for a never-mined
# one several fit about equally.  The rule:
#
#     canonical-face match: the calibrated score s (``library.match_score``), unchanged;
#     other-face match:     the conformal p-value of the ratio r = d_best / d_second among the ratios r_1..r_m
#                           of the held-out views whose own label search also picked another face,
#                               p(r) = (1 + #{i: r_i >= r}) / (m + 1)
#                           (Vovk, Gammerman & Shafer 2005; Angelopoulos & Bates 2021, sec. 1: for a view
#                           exchangeable with those, P(p <= a) <= a; large ratios are the nonconforming ones);
#
# both are tail probabilities of known views, so one split-conformal cut (``conformal_cut``) on the rule's value
# over the held-out views keeps the known-flag rate near alpha: the scores of the held-out views whose own search
# stays on the canonical face (the plain cut's own calibration set) and the p-values (each leaving its own view
# out) of the held-out views decided on another face.  For the ratios the held-out views mimic the label
# decision: the view's distance to its own prototype is the leave-one-out one (``pipeline.single_view_calibration``),
# to every other prototype the label search's; the nearest decides the face and the ratio.  Fitted on mined
# objects' single views only (no unknowns are needed).

RATIO_ATTRS = ("unknown_tilt_ratios", "unknown_rule_cut")
MIN_RATIO_VIEWS = 19   # with m ratios a p-value is at least 1 / (m + 1): fewer than 1 / alpha - 1 cannot flag at 0.05


def best_second_ratio(D) -> np.ndarray:
    """(n, K) distances -> (n, K) r_j = D_j / min over i != j of D_i (the ratio of the best to the second-best
    distance at the best prototype, above 1 at every other); NaN where D_j is not finite, 0 where no other
    prototype has a finite distance (nothing competes)."""
    D = np.asarray(D, np.float64)
    n, K = D.shape
    Df = np.where(np.isfinite(D), D, np.inf)
    if K < 2:
        other = np.full((n, K), np.inf)
    else:
        part = np.sort(Df, axis=1)[:, :2]                        # the two least distances of each row
        is_min = Df == part[:, :1]
        other = np.where(is_min, part[:, 1:2], part[:, :1])      # min over the others: the second at the min, else the min
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(np.isfinite(other), Df / np.where(np.isfinite(other), other, 1.0), 0.0)
    return np.where(np.isfinite(D), r, np.nan)


def ratio_pvalue(calibration, r) -> np.ndarray:
    """Conformal p-value (1 + #{calibration >= r}) / (m + 1) of ratios ``r`` among m calibration ratios."""
    c = np.sort(np.asarray(calibration, np.float64).ravel())
    r = np.asarray(r, np.float64)
    ge = c.size - np.searchsorted(c, r, side="left")
    return (1.0 + ge) / (c.size + 1.0)


def loo_ratio_pvalues(calibration) -> np.ndarray:
    """Each calibration ratio's p-value among the others: (1 + #{j != i: r_j >= r_i}) / m."""
    c = np.asarray(calibration, np.float64).ravel()
    s = np.sort(c)
    ge = c.size - np.searchsorted(s, c, side="left")             # counts r_i itself
    return ge / max(c.size, 1)


def rule_scores(score, ratio, upright, tilt_ratios) -> np.ndarray:
    """The rule's value (broadcast together): the score on the canonical face, the ratio's p-value elsewhere."""
    p = ratio_pvalue(tilt_ratios, np.nan_to_num(np.asarray(ratio, np.float64), nan=np.inf))
    return np.where(np.asarray(upright, bool), score, np.where(np.isfinite(np.asarray(ratio, np.float64)), p, 0.0))


def calibrate_rule(D, S, U, own, own_d, own_s, own_up, alpha: float) -> dict | None:
    """The rule's calibration from held-out views: D, S, U (Q, K) distance, score and face kind (canonical) of
    each view against every prototype as the label search gives them; own (Q,) its object's prototype and own_d,
    own_s, own_up (Q,) the leave-one-out distance, score and face kind there.  Returns {"unknown_tilt_ratios":
    sorted ratios of views whose decision is another face, "unknown_rule_cut"}, or None when fewer than
    ``MIN_RATIO_VIEWS`` views decide on another face (the plain score then stays the rule)."""
    D, S, U = (np.array(a) for a in (D, S, U))
    i = np.arange(len(own))
    D[i, own], S[i, own], U[i, own] = own_d, own_s, own_up
    D = np.where(np.isfinite(D), D, np.inf)
    ok = np.isfinite(D).any(axis=1)
    D, S, U = D[ok], S[ok], U[ok].astype(bool)
    b = np.argmin(D, axis=1)
    j = np.arange(len(b))
    r, s, u = best_second_ratio(D)[j, b], S[j, b], U[j, b]
    tilted = ~u
    if tilted.sum() < MIN_RATIO_VIEWS:
        return None
    # canonical: the scores of the views whose own search stays on the canonical face (the library's own
    # calibration set; measured: the label-decision mimic, s at the nearest prototype, puts the cut lower than the
    # known views at label time need: seed-1 demo cut 0.007, 20% of unknowns flagged, 2% of knowns)
    own_up = np.asarray(own_up, bool)[ok]
    value = np.concatenate([np.asarray(own_s, np.float64)[ok][own_up], loo_ratio_pvalues(r[tilted])])
    return {"unknown_tilt_ratios": np.sort(r[tilted]), "unknown_rule_cut": conformal_cut(value, alpha)}


def fisher_combine(s, p) -> np.ndarray:
    """Fisher's combination of two tail probabilities (broadcast together): P(chi2_4 >= -2 ln(s p)) = x (1 - ln x),
    x = s p (Fisher 1925, "Statistical methods for research workers", sec. 21.1); in [0, 1], 0 where either is 0.
    Used by ``[mine] view_normalise_ratio`` to join the calibrated score and the best/second ratio's p-value."""
    return fisher_combine_many(s, p)


def fisher_combine_many(*ps) -> np.ndarray:
    """Fisher's combination of m tail probabilities (broadcast together): P(chi2_2m >= -2 ln x), x = prod p_i, which is
    x sum_{i < m} (-ln x)^i / i! (the chi-squared tail of even degrees of freedom as a Poisson sum; Fisher 1925, sec.
    21.1); in [0, 1], 0 where any is 0.  With two it is :func:`fisher_combine`.  Used by ``[mine] view_normalise_unseen``
    to join the calibrated score, the ratio's p-value and the unseen share's p-value."""
    if not ps:
        raise ValueError("expected at least one tail probability")
    x = np.asarray(1.0)
    for p in ps:
        x = x * np.asarray(p, np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = -np.log(np.where(x > 0, x, 1.0))
    total, term = np.zeros_like(t), np.ones_like(t)
    for i in range(len(ps)):
        total = total + term
        term = term * t / (i + 1)
    return np.where(x > 0, np.minimum(x * total, 1.0), 0.0)


# --- the stretch (``[mine] view_normalise_stretch``) -------------------------------------------------------------
#
# The pose search scales each prototype by the best of ``[mine] scales`` (``posesearch``: P_sigma(rho, z) =
# P(rho / sigma, z / sigma)) after the grid has already normalised the object's own footprint radius and height, so a
# view of a known class fits its prototype near sigma = 1, and a view of another shape takes whatever stretch lays the
# prototype's parts over its own: on the demos' label views the never-mined objects' best sigma was never 1 (all
# stereo seeds 0 / 1: 0 of 13 and 1 of 23 passed never-mined views at sigma = 1, against 50 of 106 and 52 of 99
# correctly named known views; held out, the same views at their nearest prototype sit between: 47% at 1).  The
# stretch |ln sigma| at the decided prototype enters the label score as its conformal p-value among the held-out
# views' stretches at their nearest prototype, (1 + #{x_i >= x}) / (m + 1) (``ratio_pvalue``; ties count against the
# view, so a scale set of a few values gives conservative p-values), joined with the others by Fisher's combination.


def scale_stretch(fit_scale) -> np.ndarray:
    """|ln sigma| of the pose search's scales ``fit_scale`` (any shape): how far the search stretched the prototype
    (0 at sigma = 1; inf where the scale is not finite or not positive: no match, the least conforming)."""
    s = np.asarray(fit_scale, np.float64)
    ok = np.isfinite(s) & (s > 0)
    return np.where(ok, np.abs(np.log(np.where(ok, s, 1.0))), np.inf)


# --- the members' statistic (``[mine] label_members_score``) ----------------------------------------------------
#
# A single view's k-nearest-member margin at its decided prototype (``label.matcher.member_statistic``) enters the
# label score as its conformal p-value among the held-out views decided on the same prototype (a Mondrian split by
# class: each class's own views set what is usual for it), joined with the others by Fisher's combination.

MIN_CLASS_MEMBER_VIEWS = 19   # a prototype that decided fewer held-out views takes the pooled p-values (with m views a
                              # p-value is at least 1 / (m + 1): 19 can reach 0.05)


def mondrian_loo_pvalues(x: np.ndarray, groups: np.ndarray, min_views: int) -> np.ndarray:
    """Each held-out view's statistic x (Q,) as a leave-one-out conformal p-value among the views of its own group
    (Q,) (a Mondrian split, Vovk, Gammerman & Shafer 2005), or among all views when its group holds fewer than
    ``min_views`` (``loo_ratio_pvalues``: larger values less conforming).  Used for the member statistic by decided
    prototype (``[mine] label_members_score``, ``MIN_CLASS_MEMBER_VIEWS``) and the stretch by face kind (``[mine]
    view_normalise_stretch_face``, ``pipeline.MIN_FACE_STRETCH_VIEWS``)."""
    x, groups = np.asarray(x, np.float64), np.asarray(groups)
    p = loo_ratio_pvalues(x)
    for c in np.unique(groups):
        sel = groups == c
        if sel.sum() >= min_views:
            p[sel] = loo_ratio_pvalues(x[sel])
    return p


def member_pvalues(values: np.ndarray, classes: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``[mine] label_members_score`` at label time: the conformal p-values (n, K) of member statistics x (n, K) (column
    c: prototype c), (1 + #{x_i >= x}) / (m + 1) among the held-out views decided on c (``values`` with their
    ``classes``, the library's attributes), or among all of them when c decided fewer than ``MIN_CLASS_MEMBER_VIEWS``
    (as :func:`mondrian_loo_pvalues` at calibration); 1 where x is NaN (no statistic: nothing to join)."""
    values, classes = np.asarray(values, np.float64), np.asarray(classes, np.int64)
    x = np.asarray(x, np.float64)
    xx = np.nan_to_num(x, nan=np.inf)
    p = ratio_pvalue(values, xx)
    for c in range(x.shape[1]):
        sel = classes == c
        if sel.sum() >= MIN_CLASS_MEMBER_VIEWS:
            p[:, c] = ratio_pvalue(values[sel], xx[:, c])
    return np.where(np.isfinite(x), p, 1.0)
