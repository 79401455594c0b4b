"""The examples tools/find_all.py and tools/find_cache.py search: per class of a store, one drawn as the demo's find
draws it (numpy default_rng(seed).choice over the class's objects) and ``extra`` more (default_rng(seed + 1).choice
of the class's others, without replacement).  Not a test."""
import numpy as np


def find_examples(labels: np.ndarray, seed: int, extra: int):
    """Yield (class, row, drawn) for every labelled class of ``labels`` (N,) (None: no truth), in class order; drawn
    True for the demo's draw."""
    for cls in sorted({l for l in labels if l}):
        idx = np.flatnonzero(labels == cls)
        ex = int(np.random.default_rng(seed).choice(idx))
        rest = idx[idx != ex]
        more = np.random.default_rng(seed + 1).choice(rest, size=min(extra, len(rest)), replace=False) if extra else []
        for e, drawn in [(ex, True)] + [(int(m), False) for m in more]:
            yield cls, e, drawn
