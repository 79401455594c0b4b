"""Ranking measures shared by the find tests (not a test module)."""
from __future__ import annotations

import numpy as np
from sklearn.metrics import average_precision_score


def p10_ap(key, cls, ids, ex, target):
    """Precision at 10 (definition: the share of the example's class among the first 10, ties by id, the example
    left out) and average precision (scikit-learn) of ranking by ``key`` ascending."""
    others = np.array([i for i in range(len(key)) if i != ex])
    k = np.where(np.isfinite(key[others]), key[others], np.finfo(np.float64).max)
    order = others[np.lexsort((ids[others], k))]
    rel = cls[others] == target
    return float(np.mean(cls[order[:10]] == target)), float(average_precision_score(rel, -k))
