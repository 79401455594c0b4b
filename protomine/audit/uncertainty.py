"""How sure the audit numbers are when only a few dozen objects carry held-out labels.

Conventions:

- ``clusters`` (N,) integer cluster ids and ``labels`` (N,) truth labels of the N labelled objects.
- Confidence intervals are two-sided at ``confidence`` (default 0.95).
- Bootstrap intervals (``scipy.stats.bootstrap``, percentile method) resample the labelled objects with
  replacement, keeping each object's (cluster, label) pair together.  Percentile rather than BCa because
  audit statistics are often degenerate (a clean set gives purity 1 in every resample) and BCa then fails.
- Per-cluster purity intervals are Wilson score intervals (Wilson 1927) of k majority-label members among
  n labelled members, from ``scipy.stats.binomtest(...).proportion_ci(method="wilson")``.
- Randomness enters as a ``numpy.random.Generator`` passed in by the caller.
"""
from __future__ import annotations

import warnings
from typing import Callable

import numpy as np
from scipy.stats import DegenerateDataWarning, binomtest, bootstrap
from sklearn.metrics import normalized_mutual_info_score


from .metrics import _check_pair, _hungarian_accuracy, _purity, contingency

__all__ = ["wilson_interval", "labels_needed_for_width", "bootstrap_intervals", "propagation_accuracy"]

STATISTICS = ("purity", "nmi", "hungarian_accuracy")


# --- Wilson ---------------------------------------------------------------------------------

def wilson_interval(successes: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval (low, high) for a proportion with ``successes`` out of ``n`` trials.

    n = 0 gives the uninformative (0, 1).
    """
    successes, n = int(successes), int(n)
    if n < 0 or not 0 <= successes <= max(n, 0):
        raise ValueError(f"need 0 <= successes <= n, got successes={successes}, n={n}")
    if not 0 < confidence < 1:
        raise ValueError(f"confidence must be in (0, 1), got {confidence}")
    if n == 0:
        return 0.0, 1.0
    ci = binomtest(successes, n).proportion_ci(confidence_level=confidence, method="wilson")
    return float(ci.low), float(ci.high)


def _wilson_width(p: float, n: int, confidence: float) -> float:
    lo, hi = wilson_interval(int(round(p * n)), n, confidence)
    return hi - lo


def labels_needed_for_width(purity: float | None, target_width: float, confidence: float = 0.95,
                            *, max_n: int = 1_000_000) -> int:
    """Smallest number of labelled members whose Wilson interval is at most ``target_width`` wide.

    The observed purity is taken as the true one (k = round(purity * n)); ``None`` (no labels yet) uses
    the worst case 0.5.  Found by bisection: the width shrinks with n (up to the rounding of k, which can
    move the answer by a label or two).  Returns ``max_n`` if even that many are not enough.
    """
    if not 0 < target_width <= 1:
        raise ValueError(f"target_width must be in (0, 1], got {target_width}")
    p = 0.5 if purity is None else float(purity)
    if not 0 <= p <= 1:
        raise ValueError(f"purity must be in [0, 1], got {p}")
    if _wilson_width(p, max_n, confidence) > target_width:
        return max_n
    lo, hi = 0, max_n            # invariant: width(lo) > target (width(0) = 1), width(hi) <= target
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _wilson_width(p, mid, confidence) <= target_width:
            hi = mid
        else:
            lo = mid
    return hi


# --- bootstrap ------------------------------------------------------------------------------

def _encode(clusters: np.ndarray, labels: np.ndarray) -> tuple[np.ndarray, np.ndarray, int, int]:
    _, ci = np.unique(clusters, return_inverse=True)
    _, li = np.unique(labels, return_inverse=True)
    return ci.ravel(), li.ravel(), int(ci.max()) + 1, int(li.max()) + 1


def _batched_purity(ci: np.ndarray, li: np.ndarray, n_clusters: int, n_labels: int) -> np.ndarray:
    """Purity of each row of resampled codes ci, li (B, N) -> (B,), without a Python loop over B."""
    ci = np.atleast_2d(ci)
    li = np.atleast_2d(li)
    b = ci.shape[0]
    flat = (np.arange(b)[:, None] * n_clusters + ci) * n_labels + li          # (B, N) cell index
    table = np.bincount(flat.ravel(), minlength=b * n_clusters * n_labels).reshape(b, n_clusters, n_labels)
    return table.max(axis=2).sum(axis=1) / ci.shape[1]


def _nmi(ci: np.ndarray, li: np.ndarray) -> float:
    return float(normalized_mutual_info_score(li, ci))


def _accuracy(ci: np.ndarray, li: np.ndarray) -> float:
    return _hungarian_accuracy(contingency(ci, li)[0])


def bootstrap_intervals(clusters, labels, rng: np.random.Generator, *, n_resamples: int = 1000,
                        confidence: float = 0.95,
                        statistics: tuple[str, ...] = STATISTICS) -> dict[str, tuple[float, float]]:
    """Percentile bootstrap intervals {name: (low, high)} for purity, NMI and Hungarian accuracy.

    clusters, labels: (N,) of the labelled objects.  Each resample draws N labelled objects with
    replacement.  A single labelled object gives the degenerate interval (value, value).
    """
    clusters, labels = _check_pair(clusters, labels)
    if n_resamples < 2:
        raise ValueError(f"n_resamples must be >= 2, got {n_resamples}")
    unknown = set(statistics) - set(STATISTICS)
    if unknown:
        raise ValueError(f"unknown statistics {sorted(unknown)} (known: {STATISTICS})")
    return _bootstrap_intervals(clusters, labels, rng, n_resamples, confidence, statistics)


def _bootstrap_intervals(clusters, labels, rng, n_resamples, confidence, statistics):
    ci, li, k, m = _encode(clusters, labels)
    fns: dict[str, tuple[Callable, bool]] = {
        "purity": (lambda c, l, axis=-1: _batched_purity(c, l, k, m), True),
        "nmi": (_nmi, False),
        "hungarian_accuracy": (_accuracy, False),
    }
    out = {}
    for name in statistics:
        fn, vectorized = fns[name]
        point = float(np.asarray(fn(ci[None], li[None]) if vectorized else fn(ci, li)).ravel()[0])
        if ci.size < 2:
            out[name] = (point, point)
            continue
        with warnings.catch_warnings():
            # all resamples equal (e.g. a perfectly clean labelled set) is a valid, degenerate answer
            warnings.simplefilter("ignore", DegenerateDataWarning)
            res = bootstrap((ci, li), fn, paired=True, vectorized=vectorized, n_resamples=n_resamples,
                            confidence_level=confidence, method="percentile", rng=rng)
        low, high = float(res.confidence_interval.low), float(res.confidence_interval.high)
        if not (np.isfinite(low) and np.isfinite(high)):
            low = high = point
        out[name] = (low, high)
    return out


# --- label propagation ----------------------------------------------------------------------

def propagation_accuracy(clusters, labels, rng: np.random.Generator, *, draws: int = 1,
                         n_repeats: int = 1000, confidence: float = 0.95) -> dict:
    """Accuracy if each cluster is named from ``draws`` randomly chosen labelled members.

    For every repeat and every cluster with labelled members, ``min(draws, n_labelled)`` members are drawn
    without replacement and the cluster is named by the majority of their labels (ties broken at random).
    The accuracy is the fraction of *all* labelled objects whose label equals their cluster's name.
    Returns {"draws", "mean", "interval": (low, high) percentile interval over repeats, "repeats",
    "ceiling": purity (naming every cluster by its true majority), "short_clusters": clusters with fewer
    labelled members than ``draws``}.
    """
    clusters, labels = _check_pair(clusters, labels)
    if draws < 1 or n_repeats < 1:
        raise ValueError(f"draws and n_repeats must be >= 1, got draws={draws}, n_repeats={n_repeats}")
    return _propagation_accuracy(clusters, labels, rng, draws, n_repeats, confidence)


def _propagation_accuracy(clusters, labels, rng, draws, n_repeats, confidence):
    table, cluster_ids, _ = contingency(clusters, labels)
    ci, li, _, m = _encode(clusters, labels)
    correct = np.zeros(n_repeats)
    short = []
    for k in range(table.shape[0]):
        members = li[ci == k]                                       # (n_k,) label codes
        take = min(draws, members.size)
        if take < draws:
            short.append(cluster_ids[k].item())
        # a random permutation per repeat: argsort of uniform keys, first `take` columns are the draw
        order = np.argsort(rng.random((n_repeats, members.size)), axis=1)[:, :take]
        drawn = members[order]                                      # (R, take)
        votes = np.zeros((n_repeats, m))
        np.add.at(votes, (np.arange(n_repeats)[:, None], drawn), 1.0)
        votes += rng.random(votes.shape) * 0.5                      # random tie break, never beats a real vote
        name = votes.argmax(axis=1)                                 # (R,)
        correct += table[k, name]
    acc = correct / clusters.size
    alpha = (1 - confidence) / 2
    return {
        "draws": int(draws),
        "mean": float(acc.mean()),
        "interval": (float(np.quantile(acc, alpha)), float(np.quantile(acc, 1 - alpha))),
        "repeats": int(n_repeats),
        "ceiling": _purity(table),
        "short_clusters": short,
    }
