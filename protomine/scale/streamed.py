"""``protomine bench`` row [``large``]: mining more objects than fit in memory on one machine, streamed from disk.

Data (demo data, invented): the bench's synthetic volumes (:mod:`protomine.mine.synthetic`: K = 32 random
smooth prototypes, objects rolled, scaled, noisy, partly observed) on the default grid, written block by
block to two ``.npy`` files (not timed; 100,000 objects are 8.3 GB, more than the 4 GB budget).

What is timed, in a subprocess of its own so that its peak resident memory
(``resource.getrusage(RUSAGE_SELF).ru_maxrss``) is the mining's alone:
:class:`protomine.mine.minibatch.MiniBatchPoseKMeans` on :class:`protomine.mine.distributed.NpyFileSource`
(chunks of 256 objects read from disk with plain file reads, no memory map): seeding restarts on a
subsample of 2,048 objects, :func:`batch_steps` mini-batches of ``BATCH_SIZE`` objects (about one epoch,
at most ``BATCH_STEPS``: 24 batches, half the objects, at 100,000), one full assignment pass over every
object.  Reported: ``seconds``, ``cpu_s`` (CPU seconds of the mining process, all its threads: what the
mining cost, whatever else ran on the machine), ``ready_threads`` (its threads' mean number on a CPU or ready to run:
``protomine.cores.ready_threads``), ``peak_rss_mb``, ``nmi`` against the synthetic labels,
``load_1m`` when it finished.  Targets for 100,000 objects on 2 cores: under 10 minutes, under 4 GB.

Quality against full batches, on the first min(N, 10,000) objects (each fit in its own subprocess, in
memory): full-batch :class:`protomine.mine.engine.PoseKMeans` and the same mini-batch settings; reported
``ari_minibatch_vs_full`` (scikit-learn's ``adjusted_rand_score`` between the two labelings),
``inertia_ratio`` (mini-batch cost / full-batch cost, sum of member distances) and each one's NMI, seconds, CPU
seconds and ready threads (``full_*``, ``minibatch_*``; with N <= 10,000 the mini-batch side is the streamed fit
itself, the same file, settings and seed, not fitted a second time).  ``gen_s``, ``gen_cpu_s``: writing the data (posed on every
core by :mod:`protomine.mine.synthetic`, each block written on a thread while the next is generated).
"""
from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

N_PROTOTYPES = 32
BATCH_SIZE = 2048
BATCH_STEPS = 24
QUALITY_OBJECTS = 10_000


def write_synthetic(folder: Path, n: int, k: int, seed: int, block: int = 1000
                    ) -> tuple[tuple[Path, Path, Path], np.ndarray]:
    """X.npy (n, C, R, A, H), W.npy (n, R, A, H) float32 and labels.npy (n,), written block by block; returns
    their paths and the prototypes P (k, C, R, A, H) the objects were drawn from.  A block is written on a thread
    of its own while the next one is generated (itself posed on every core: :mod:`protomine.mine.synthetic`); the
    blocks are drawn in order from one generator, so the files do not depend on the threads."""
    from concurrent.futures import ThreadPoolExecutor

    from ..mine.synthetic import synthetic_objects, synthetic_prototypes
    rng = np.random.default_rng(seed)
    P = synthetic_prototypes(rng, k)
    paths = folder / "X.npy", folder / "W.npy", folder / "labels.npy"
    shapes = (n,) + P.shape[1:], (n,) + P.shape[2:]
    labels = np.empty(n, np.int64)
    with open(paths[0], "wb") as fx, open(paths[1], "wb") as fw, ThreadPoolExecutor(1, "synthetic-writer") as writer:
        for f, shape in zip((fx, fw), shapes):
            np.lib.format.write_array_header_1_0(f, {"descr": "<f4", "fortran_order": False, "shape": shape})

        def write(X: np.ndarray, W: np.ndarray) -> None:
            fx.write(X.data)
            fw.write(W.data)

        written = None
        for i0 in range(0, n, block):
            X, W, lab, *_ = synthetic_objects(rng, P, min(block, n - i0))
            labels[i0:i0 + len(lab)] = lab
            if written is not None:
                written.result()  # one block in flight: memory stays two blocks
            written = writer.submit(write, X, W)
        if written is not None:
            written.result()
    np.save(paths[2], labels)
    return paths, P


def batch_steps(n: int) -> int:
    """Mini-batches for n objects: about one epoch (n / BATCH_SIZE), at least 4, at most BATCH_STEPS."""
    return int(max(4, min(BATCH_STEPS, -(-n // BATCH_SIZE))))


def _model(kind: str, k: int, seed: int, n: int):
    from ..config import load_config
    from ..mine.engine import PoseKMeans
    from ..mine.minibatch import MiniBatchPoseKMeans
    common = dict(n_clusters=k, scales=tuple(load_config(None)["mine"]["scales"]), n_init=2, max_iter=15, chunk_size=256, random_state=seed,
                  sample_size=2048)
    if kind == "full":
        return PoseKMeans(cache_mb=128, **common)
    return MiniBatchPoseKMeans(batch_size=BATCH_SIZE, n_steps=batch_steps(n), **common)


def fit_once(x_path: str, w_path: str, labels_path: str, kind: str, n: int, k: int, seed: int, out: str) -> dict:
    """Run in a subprocess: fit ``kind`` ("minibatch": streamed from disk; "full": the first n objects in
    memory) and report seconds, peak RSS and NMI; labels (and cost) saved to ``out``."""
    from sklearn.metrics import normalized_mutual_info_score

    from ..mine.distributed import NpyFileSource
    from ..mine.engine import ArraySource
    src = NpyFileSource(x_path, w_path)
    truth = np.load(labels_path)[:n]
    if kind == "full" or n < len(src):
        src = ArraySource(*src.read(0, n))  # the quality subset: 10,000 objects fit in memory
    from ..cores import ready_clock, ready_threads
    t0, c0, r0 = time.perf_counter(), time.process_time(), ready_clock()
    model = _model(kind, k, seed, n).fit(src)
    secs, cpu = time.perf_counter() - t0, time.process_time() - c0
    ready = ready_threads(r0, secs)
    np.save(out, np.asarray(model.labels_))
    return {"kind": kind, "n_objects": n, "seconds": secs, "cpu_s": cpu, "ready_threads": ready,
            "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
            "inertia": float(model.inertia_), "n_iter": int(model.n_iter_),
            "nmi": float(normalized_mutual_info_score(truth, model.labels_)), "load_1m": os.getloadavg()[0]}


def _in_subprocess(paths: tuple[Path, Path, Path], kind: str, n: int, k: int, seed: int, out: Path) -> dict:
    args = ", ".join(repr(a) for a in (str(paths[0]), str(paths[1]), str(paths[2]), kind, n, k, seed, str(out)))
    code = f"import json; from protomine.scale.streamed import fit_once; print(json.dumps(fit_once({args})))"
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    if res.returncode != 0:
        raise RuntimeError(f"{kind} fit of {n} objects failed:\n{res.stderr[-2000:]}")
    return json.loads(res.stdout.strip().splitlines()[-1])


def bench_large(n: int, seed: int, k: int = N_PROTOTYPES) -> dict:
    """The row (module docstring) for ``n`` objects."""
    from sklearn.metrics import adjusted_rand_score
    with tempfile.TemporaryDirectory(prefix="protomine-large-") as tmp:
        t0, c0 = time.perf_counter(), time.process_time()
        paths, _ = write_synthetic(Path(tmp), n, k, seed)
        gen_s, gen_cpu = time.perf_counter() - t0, time.process_time() - c0
        print(f"[bench] wrote {n} synthetic objects in {gen_s:.0f} s", file=sys.stderr, flush=True)
        big = _in_subprocess(paths, "minibatch", n, k, seed, Path(tmp) / "big.npy")
        print(f"[bench] mined {n} objects streamed from disk in {big['seconds']:.0f} s, peak "
              f"{big['peak_rss_mb']:.0f} MB, load {big['load_1m']:.1f}", file=sys.stderr, flush=True)
        q = min(n, QUALITY_OBJECTS)
        full = _in_subprocess(paths, "full", q, k, seed, Path(tmp) / "full.npy")
        # the quality subset is the whole row (n <= QUALITY_OBJECTS, e.g. --quick): its mini-batch fit is the streamed
        # fit just made (fit_once streams the same file with the same seed), so it is not run twice
        mb = big if q == n else _in_subprocess(paths, "minibatch", q, k, seed, Path(tmp) / "mb.npy")
        mb_labels = np.load(Path(tmp) / ("big.npy" if q == n else "mb.npy"))
        ari = float(adjusted_rand_score(np.load(Path(tmp) / "full.npy"), mb_labels))
    return {"n_objects": n, "n_prototypes": k, "batch_size": BATCH_SIZE, "batch_steps": batch_steps(n),
            "seconds": big["seconds"], "cpu_s": big["cpu_s"], "ready_threads": big["ready_threads"],
            "peak_rss_mb": big["peak_rss_mb"], "nmi": big["nmi"],
            "load_1m": big["load_1m"], "data_gb": _data_bytes(n) / 1e9, "gen_s": gen_s, "gen_cpu_s": gen_cpu,
            "quality_objects": q, "full_s": full["seconds"], "full_cpu_s": full["cpu_s"],
            "full_ready_threads": full["ready_threads"], "minibatch_s": mb["seconds"], "minibatch_cpu_s": mb["cpu_s"],
            "minibatch_ready_threads": mb["ready_threads"],
            "ari_minibatch_vs_full": ari, "inertia_ratio": mb["inertia"] / full["inertia"],
            "full_nmi": full["nmi"], "minibatch_nmi": mb["nmi"], "quality_load_1m": mb["load_1m"]}


def _data_bytes(n: int) -> int:
    """Bytes of X and W (float32) for n objects on the bench grid."""
    from ..mine.synthetic import GRID
    C, R, A, H = GRID
    return n * 4 * (C + 1) * R * A * H
