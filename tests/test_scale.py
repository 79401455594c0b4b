"""Scale-out: executors, the sharded store, distributed ingest and mining on a 2-worker LocalCluster,
mini-batch mining.  The cluster binds to 127.0.0.1 only and is shared by the module, then closed."""
from __future__ import annotations

import copy
import shutil
from pathlib import Path

import numpy as np
import pytest

from protomine.config import load_config
from protomine.errors import InputError
from protomine.ingest.pipeline import ingest_captures
from protomine.ingest.sharded import ShardedObjectStore, capture_groups, ingest_sharded, open_store
from protomine.ingest.store import ObjectStore, is_index
from protomine.scale.executor import DaskExecutor, InlineExecutor, make_executor



@pytest.fixture(scope="module")
def dask_client():
    from distributed import Client, LocalCluster
    cluster = LocalCluster(n_workers=2, processes=True, threads_per_worker=1, host="127.0.0.1",
                           dashboard_address=None)
    client = Client(cluster, set_as_default=False)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


@pytest.fixture(scope="module")
def dask_exec(dask_client):
    ex = DaskExecutor(client=dask_client, min_workers=2)
    yield ex
    ex.close()


def _square(shared: int, item: int) -> int:
    if item < 0:
        raise InputError("x.csv", "row", f"negative item {item}")
    return shared * item * item


def test_executor_map_keeps_item_order_and_reraises_input_errors(dask_exec):
    items = list(range(9, -1, -1))
    for ex in (InlineExecutor(), dask_exec):
        assert ex.map(_square, items, shared=2) == [2 * i * i for i in items]
        with pytest.raises(InputError, match="negative item -1"):
            ex.map(_square, [1, -1], shared=1)
    assert dask_exec.n_workers == 2


def test_pool_map_takes_items_from_an_iterator_in_order(pool_exec):
    """Items drawn from a generator (submitted as they are drawn) come back folded in item order, as from a
    list (reference: the same comprehension in this process)."""
    items = list(range(9, -1, -1))
    drawn = []

    def gen():
        for i in items:
            drawn.append(i)
            yield i

    got = pool_exec.map(_square, gen(), shared=2, fold=lambda acc, r: (acc or []) + [r])
    assert got == [2 * i * i for i in items] and drawn == items
    assert pool_exec.map(_square, iter(items), shared=2) == [2 * i * i for i in items]
    with pytest.raises(InputError, match="negative item -1"):
        pool_exec.map(_square, iter([1, -1, 2]), shared=1, fold=lambda acc, r: r)


def test_submit_runs_one_item_beside_the_caller_and_reraises_input_errors(pool_exec):
    """``submit`` (the demo's work beside its own stages): fn(shared, item) as computed here (reference: the
    same call in this process), with map items submitted after it still in item order; a worker's InputError
    comes back as such from ``result()``, and the inline executor runs the item at once."""
    pending = [pool_exec.submit(_square, 3, i) for i in (4, 5)]
    assert pool_exec.map(_square, [1, 2], shared=2) == [2, 8]
    assert [p.result() for p in pending] == [3 * 16, 3 * 25]
    bad = pool_exec.submit(_square, 1, -2)
    with pytest.raises(InputError, match="negative item -2"):
        bad.result()
    assert InlineExecutor().submit(_square, 2, 7).result() == 98
    with pytest.raises(InputError, match="negative item -1"):
        InlineExecutor().submit(_square, 1, -1).result()


def _thread_pools(shared: None, item: int) -> tuple[list[int], int]:
    from threadpoolctl import threadpool_info
    import scipy.linalg  # noqa: F401  (scipy's own BLAS, loaded here if not yet)
    import torch
    return [p["num_threads"] for p in threadpool_info()], torch.get_num_threads()


def test_pool_workers_run_every_thread_pool_with_one_thread(pool_exec):
    """protomine.cores policy: a worker process has one thread in torch and in every BLAS / OpenMP pool
    (as threadpoolctl, scikit-learn's thread-pool inspector, reports them)."""
    for pools, torch_threads in pool_exec.map(_thread_pools, range(4)):
        assert pools and set(pools) == {1} and torch_threads == 1


def _scaled_run(shared: int, run: list[int]) -> list[int]:
    if any(i < 0 for i in run):
        raise InputError("x.csv", "row", f"negative item in {run}")
    return [shared * i for i in run]


def test_balanced_map_hands_out_consecutive_runs_covering_every_item_once(dask_exec):
    """Guided self-scheduling (Polychronopoulos & Kuck 1987: each request takes a share of what remains): the
    runs tile the items in order, each item exactly once, folded in item order whatever the completion order."""
    items = list(range(23))
    got = dask_exec.map(_scaled_run, items, shared=3, balanced=True, fold=lambda acc, r: (acc or []) + r)
    assert got == [3 * i for i in items]
    runs = dask_exec.last_runs
    assert runs[0][0] == 0 and runs[-1][1] == len(items)
    assert all(b0 == a1 for (_, b0, _), (a1, _, _) in zip(runs[:-1], runs[1:]))  # consecutive, no overlap
    assert {j for *_, j in runs} == {0, 1} and len(runs) < len(items)        # both workers, fewer tasks than items
    assert max(b - a for a, b, _ in runs) == 6                                # the first run: half of the larger share (12 items)
    assert dask_exec.map(_scaled_run, items[:1], shared=2, balanced=True) == [[0]]
    assert dask_exec.map(_scaled_run, [], shared=2, balanced=True) == []
    with pytest.raises(InputError, match="negative item"):
        dask_exec.map(_scaled_run, [1, 2, -1, 4, 5], shared=1, balanced=True)


def test_results_come_straight_from_workers_only_on_loopback(dask_exec):
    """Loopback: 127.0.0.0/8 (RFC 1122 3.2.1.3) and ::1 (RFC 4291 2.5.3); the module's cluster binds 127.0.0.1."""
    from protomine.scale.executor import _loopback
    assert dask_exec.direct and dask_exec.map(_square, [1, 2, 3], shared=1) == [1, 4, 9]
    assert _loopback("tcp://127.0.0.2:40000") and _loopback("tcp://[::1]:40000") and _loopback("tcp://localhost:1")
    assert not _loopback("tcp://10.0.0.5:8786") and not _loopback("tls://sched-host:8786")


def test_make_executor_from_config_and_flags():
    cfg = load_config(None)
    assert isinstance(make_executor(cfg), InlineExecutor)  # the default runs in this process
    with pytest.raises(InputError, match="scheduler address"):
        make_executor(cfg, scheduler="not an address")
    with pytest.raises(InputError, match="cannot reach a Dask scheduler"):
        DaskExecutor("tcp://127.0.0.1:1", timeout=1.0)  # nothing listens on port 1


def test_capture_groups_cover_all_captures_in_order():
    g = capture_groups(10, 3, max_per_group=3)
    assert g == [(0, 3), (3, 6), (6, 9), (9, 10)]
    assert capture_groups(3, 8) == [(0, 1), (1, 2), (2, 3)]


def _tables_equal(a: ObjectStore, b: ObjectStore) -> None:
    for k in a.objects:
        assert np.array_equal(a.objects[k], b.objects[k]), k
    for k in a.views:
        assert np.array_equal(a.views[k], b.views[k]), k
    for k in a.captures:
        if k != "path":
            assert np.array_equal(a.captures[k], b.captures[k]), k
    assert np.array_equal(a.crop_object, b.crop_object) and np.array_equal(a.crop_frame, b.crop_frame)
    assert np.array_equal(a.single_object, b.single_object) and np.array_equal(a.single_frame, b.single_frame)
    assert np.array_equal(a.read_volumes(0, len(a)), b.read_volumes(0, len(b)))
    assert np.array_equal(a.read_single_views(), b.read_single_views())
    rows = np.array([len(a.single_object) - 1, 0])
    assert np.array_equal(a.read_single_views(rows), b.read_single_views(rows))
    perm = np.arange(len(a))[::-1]
    assert np.array_equal(a.read_volume_at(perm), b.read_volume_at(perm))
    for oid in a.ids:
        assert all(np.array_equal(x, y) for x, y in zip(a.crops(oid), b.crops(oid)))
    assert a.fingerprint() == b.fingerprint()


def test_sharded_ingest_on_cluster_equals_single_file_store(tiny_world, dask_exec, tmp_path):
    store = tmp_path / "sharded" / "objects.h5"
    res = ingest_sharded(tiny_world["caps"], store, tiny_world["cfg"], executor=dask_exec, seed=0,
                         max_captures_per_shard=2)
    assert is_index(store) and res["shards"] == 2 and res["objects"] == 6
    sharded, single = open_store(store), ObjectStore(tiny_world["store"])
    assert isinstance(sharded, ShardedObjectStore) and len(sharded.shards) == 2
    _tables_equal(sharded, single)


def test_sharded_reingest_replaces_a_capture_and_drops_dead_shards(tiny_world, tmp_path):
    cfg = tiny_world["cfg"]
    store = tmp_path / "objects.h5"
    ingest_sharded(tiny_world["caps"], store, cfg, executor=InlineExecutor(), max_captures_per_shard=1)
    shards_before = sorted((tmp_path / "objects.h5.shards").glob("*.h5"))
    assert len(shards_before) == 3
    res = ingest_sharded(tiny_world["caps"][1:2], store, cfg, executor=InlineExecutor())
    assert res["store"] == {"kept": 4, "replaced": 2, "added": 2}
    after = sorted((tmp_path / "objects.h5.shards").glob("*.h5"))
    assert len(after) == 3 and shards_before[1] not in after  # the re-ingested capture's old shard is gone
    st = open_store(store)
    # the re-ingested capture's objects now come last, with identical volumes (same seed)
    single = ObjectStore(tiny_world["store"])
    order = [single.index_of(i) for i in st.ids]
    assert sorted(order) == list(range(6)) and order[-2:] == [2, 3]
    assert np.array_equal(st.read_volumes(0, 6), single.read_volume_at(np.array(order)))


def test_single_file_ingest_refuses_to_overwrite_an_index_and_vice_versa(tiny_world, tmp_path):
    cfg = tiny_world["cfg"]
    store = tmp_path / "objects.h5"
    ingest_sharded(tiny_world["caps"][:1], store, cfg, executor=InlineExecutor())
    with pytest.raises(InputError, match="sharded store index"):
        ingest_captures(tiny_world["caps"][1:2], store, cfg)
    single = tmp_path / "single.h5"
    shutil.copy(tiny_world["store"], single)
    with pytest.raises(InputError, match="single-file store"):
        ingest_sharded(tiny_world["caps"][:1], single, cfg, executor=InlineExecutor())


# --- mining ------------------------------------------------------------------------------------

def _chunked(cfg: dict, chunk: int = 2) -> dict:
    """The tiny config with chunks of ``chunk`` objects, so a pass has several chunks on both workers."""
    out = copy.deepcopy(cfg)
    out["mine"]["chunk_size"] = chunk
    return out


def _libraries_equal(a, b) -> None:
    """Exact equality.  The cluster's reduction follows the one-process pass step by step: the same chunks
    (``[mine] chunk_size``), each chunk's aligned sums transformed back and added in float64 in chunk order
    (``engine._assign_pass`` and ``distributed._fold_parts``), and the per-chunk float32 kernels run with the
    same torch thread count (``_same_threads``).  Equal inputs through equal operations in equal order give
    equal floats on any versions of the libraries, so nothing here needs a tolerance."""
    assert list(a.members["object"]) == list(b.members["object"])
    for k in a.members:
        if k != "object":
            assert np.array_equal(a.members[k], b.members[k]), k
    for k in a.prototypes:
        x, y = np.asarray(a.prototypes[k]), np.asarray(b.prototypes[k])
        assert np.array_equal(x, y, equal_nan=x.dtype.kind == "f"), k


@pytest.fixture
def _same_threads(dask_client):
    """One torch thread in this process and in every worker while the test runs (restored after)."""
    import torch
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    dask_client.run(torch.set_num_threads, 1)
    try:
        yield
    finally:
        torch.set_num_threads(before)


def test_mine_on_cluster_equals_local_mine(tiny_world, dask_exec, _same_threads, tmp_path):
    from protomine.mine.pipeline import mine_store
    cfg = _chunked(tiny_world["cfg"])
    sharded = tmp_path / "sharded" / "objects.h5"
    ingest_sharded(tiny_world["caps"], sharded, cfg, executor=dask_exec, max_captures_per_shard=2)
    local, _ = mine_store(tiny_world["store"], tmp_path / "l" / "library.h5", cfg, seed=3, n_clusters=2)
    dist, _ = mine_store(sharded, tmp_path / "d" / "library.h5", cfg, seed=3, n_clusters=2, executor=dask_exec)
    _libraries_equal(local, dist)
    assert (tmp_path / "d" / "assignments.csv").read_text() == (tmp_path / "l" / "assignments.csv").read_text()


def test_cli_ingest_and_mine_with_scheduler_equal_local_cli(tiny_world, dask_client, _same_threads, tmp_path):
    from typer.testing import CliRunner

    from protomine.cli import app
    cfg_path = tmp_path / "tiny_chunked.toml"
    cfg_path.write_text(Path(tiny_world["config"]).read_text().replace("[mine]\n", "[mine]\nchunk_size = 2\n"))
    addr = dask_client.scheduler.address
    assert addr.startswith("tcp://127.0.0.1:")
    caps = [str(c) for c in tiny_world["caps"]]
    run = lambda *args: CliRunner().invoke(app, [*args, "-c", str(cfg_path), "-q"])  # noqa: E731
    for where, extra in (("local", []), ("dask", ["--scheduler", addr, "--workers", "2"])):
        r = run("ingest", *caps, "--out", str(tmp_path / where / "objects.h5"), *extra)
        assert r.exit_code == 0, r.output
        r = run("mine", str(tmp_path / where / "objects.h5"), "--out", str(tmp_path / where / "library.h5"),
                "--clusters", "2", *extra)
        assert r.exit_code == 0, r.output
    assert is_index(tmp_path / "dask" / "objects.h5") and not is_index(tmp_path / "local" / "objects.h5")
    from protomine.mine.library import read_library
    _libraries_equal(read_library(tmp_path / "local" / "library.h5"), read_library(tmp_path / "dask" / "library.h5"))


def _synthetic(n: int, k: int, seed: int):
    from protomine.mine.synthetic import synthetic_objects, synthetic_prototypes
    rng = np.random.default_rng(seed)
    P = synthetic_prototypes(rng, k, grid=(3, 4, 12, 4))
    X, W, labels, *_ = synthetic_objects(rng, P, n, scale_jitter=0.0)
    return X, W, labels


def test_minibatch_matches_full_batch_on_separated_classes():
    from sklearn.metrics import adjusted_rand_score

    from protomine.mine.engine import ArraySource, PoseKMeans
    from protomine.mine.minibatch import MiniBatchPoseKMeans
    X, W, truth = _synthetic(240, 4, 0)
    src = ArraySource(X, W)
    full = PoseKMeans(n_clusters=4, n_init=2, random_state=0, chunk_size=64).fit(src)
    mb = MiniBatchPoseKMeans(n_clusters=4, n_init=2, random_state=0, chunk_size=64, batch_size=32, n_steps=6,
                             sample_size=64).fit(src)
    # adjusted Rand index: scikit-learn as the reference implementation
    assert adjusted_rand_score(truth, full.labels_) == pytest.approx(1.0)
    assert adjusted_rand_score(truth, mb.labels_) == pytest.approx(1.0)
    assert mb.n_iter_ == 6 and mb.inertia_ <= 1.05 * full.inertia_


def test_minibatch_on_cluster_equals_local(dask_exec, tmp_path):
    from protomine.mine.distributed import ExecutorSource, NpySpec
    from protomine.mine.engine import ArraySource
    from protomine.mine.minibatch import MiniBatchPoseKMeans
    X, W, _ = _synthetic(120, 3, 1)
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "W.npy", W)
    kw = dict(n_clusters=3, n_init=1, random_state=5, chunk_size=16, batch_size=40, n_steps=3, sample_size=48)
    a = MiniBatchPoseKMeans(**kw).fit(ArraySource(X, W))
    b = MiniBatchPoseKMeans(**kw).fit(ExecutorSource(NpySpec(str(tmp_path / "X.npy"), str(tmp_path / "W.npy")), dask_exec))
    assert np.array_equal(a.labels_, b.labels_)
    assert np.allclose(a.prototypes_, b.prototypes_, rtol=1e-5, atol=1e-6)


def test_mine_pipeline_minibatch_mode_finds_the_two_shapes(tiny_world, tmp_path):
    from protomine.mine.pipeline import mine_store
    cfg = copy.deepcopy(tiny_world["cfg"])
    cfg["scale"]["batch_size"], cfg["scale"]["batch_steps"] = 4, 3
    lib, info = mine_store(tiny_world["store"], tmp_path / "library.h5", cfg, seed=0, n_clusters=2)
    full = ObjectStore(tiny_world["store"])
    from protomine.mine.library import read_library
    ref = read_library(tiny_world["library"])
    # boxes and cylinders: the same partition as the full-batch library (labels may be permuted)
    same = np.array_equal(lib.members["cluster"], ref.members["cluster"])
    swapped = np.array_equal(lib.members["cluster"], 1 - ref.members["cluster"])
    assert len(full) == 6 and (same or swapped) and info["iterations"] == 3


@pytest.fixture(scope="module")
def pool_exec():
    from protomine.scale.executor import PoolExecutor
    ex = PoolExecutor(2)
    yield ex
    ex.close()


def test_mine_pictures_drawn_on_a_worker_equal_those_drawn_here(tiny_world, pool_exec, tmp_path):
    """mine_store(pictures=pool): gallery.png and the member sheets drawn on a worker process are byte-identical to
    those drawn in this process (reference: the same call without ``pictures``), beside the same assignments."""
    from protomine.mine.pipeline import mine_store
    cfg = tiny_world["cfg"]
    mine_store(tiny_world["store"], tmp_path / "h" / "library.h5", cfg, seed=3, n_clusters=2)
    _, info = mine_store(tiny_world["store"], tmp_path / "w" / "library.h5", cfg, seed=3, n_clusters=2,
                         pictures=pool_exec)
    info["pictures"].result()
    names = ["gallery.png"] + [f"members/{p.name}" for p in sorted((tmp_path / "h" / "members").glob("*.png"))]
    assert len(names) == 3
    for name in names + ["assignments.csv"]:
        assert (tmp_path / "w" / name).read_bytes() == (tmp_path / "h" / name).read_bytes(), name


def test_local_process_pool_ingest_equals_single_file_store(tiny_world, pool_exec, tmp_path):
    ingest_sharded(tiny_world["caps"], tmp_path / "objects.h5", tiny_world["cfg"], executor=pool_exec)
    _tables_equal(open_store(tmp_path / "objects.h5"), ObjectStore(tiny_world["store"]))
    # captures lifted in 2 worker processes (one torch thread each), written as one file: the same store
    ingest_captures(tiny_world["caps"], tmp_path / "pool.h5", tiny_world["cfg"], executor=pool_exec)
    a, b = ObjectStore(tmp_path / "pool.h5"), ObjectStore(tiny_world["store"])
    _tables_equal(a, b)
    assert np.array_equal(a.read_volumes(0, len(a)), b.read_volumes(0, len(b)))


def test_label_and_scenes_in_worker_processes_equal_this_process(tiny_world, pool_exec, tmp_path):
    from protomine.label.matcher import label_captures
    from protomine.mine.library import read_library
    from protomine.scenes.scenario import generate_scenario
    lib = read_library(tiny_world["library"])
    here = label_captures(lib, tiny_world["caps"], tiny_world["cfg"], seed=0)
    st: dict = {}
    there = label_captures(lib, tiny_world["caps"], tiny_world["cfg"], seed=0, executor=pool_exec, stats=st)
    assert there == here and len(here) > 0 and st["workers"] == 1  # 3 captures are one item of 4
    many = tiny_world["caps"] * 2  # 6 captures: two items, one per worker (names repeat: use copies)
    copies = []
    for i, c in enumerate(many):
        copies.append(tmp_path / f"c{i}")
        shutil.copytree(c, copies[-1])
    here = label_captures(lib, copies, tiny_world["cfg"], seed=0)
    there = label_captures(lib, copies, tiny_world["cfg"], seed=0, executor=pool_exec, stats=st)
    assert there == here and st["workers"] == 2
    # tumbled instances: the workers replay the resting poses the caller's layouts computed
    kw = dict(n_mining=2, n_single=1, frames=1, width=32, height=24, seed=3, tumbled_fraction=0.5)
    generate_scenario(tmp_path / "s1", **kw)
    generate_scenario(tmp_path / "s2", executor=pool_exec, **kw)
    files = sorted(p.relative_to(tmp_path / "s1") for p in (tmp_path / "s1").rglob("*") if p.is_file())
    assert len(files) > 8
    for f in files:
        assert (tmp_path / "s1" / f).read_bytes() == (tmp_path / "s2" / f).read_bytes(), f


def test_npy_file_source_reads_what_numpy_loads(tmp_path):
    from protomine.mine.distributed import NpySpec
    rng = np.random.default_rng(0)
    X, W = rng.random((40, 2, 3, 4, 2), dtype=np.float32), rng.random((40, 3, 4, 2), dtype=np.float32)
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "W.npy", W)
    src = NpySpec(str(tmp_path / "X.npy"), str(tmp_path / "W.npy")).open()
    # reference: numpy's own reader (np.load) and fancy indexing
    x, w = src.read(5, 17)
    assert len(src) == 40 and np.array_equal(x, X[5:17]) and np.array_equal(w, W[5:17])
    idx = np.array([0, 1, 2, 9, 20, 21, 39])
    x, w = src.gather(idx)
    assert np.array_equal(x, X[idx]) and np.array_equal(w, W[idx])
    sub = src.subset(idx)
    x, w = sub.read(2, 6)
    assert len(sub) == 7 and np.array_equal(x, X[idx[2:6]]) and np.array_equal(w, W[idx[2:6]])
    x, w = src.read(37, 45)  # past the end: the rows there are, as numpy's slicing gives
    assert np.array_equal(x, X[37:45]) and np.array_equal(w, W[37:45])
    x, w = src.gather(np.array([], np.int64))
    assert x.shape == (0,) + X.shape[1:] and w.shape == (0,) + W.shape[1:]


def test_workers_auto_is_the_usable_cores():
    import os

    from protomine import cores
    # the usable cores are the affinity mask (Linux sched_getaffinity; common practice for "cores I may use")
    assert cores.resolve_workers("auto") == len(os.sched_getaffinity(0)) == cores.resolve_workers(0)
    assert cores.resolve_workers(3) == 3
    cfg = load_config(None)
    assert isinstance(make_executor(cfg, workers="auto"), InlineExecutor)  # mine: this process, cores as threads
    with pytest.raises(InputError, match="--workers"):
        make_executor(cfg, workers=-2)


def test_thread_clock_reads_the_kernels_cpu_time_and_run_queue_wait():
    import time

    from protomine import cores
    # proc(5), /proc/[pid]/task/[tid]/schedstat: time spent on the CPU and time spent waiting on a run queue,
    # in ns; the first is the same counter as CLOCK_THREAD_CPUTIME_ID (time.thread_time), so both move alike
    c0, q0 = cores.thread_clock()
    t0 = time.thread_time()
    x = 0
    while time.thread_time() - t0 < 0.2:
        x += 1
    c1, q1 = cores.thread_clock()
    t1 = time.thread_time()
    assert abs((c1 - c0) - (t1 - t0)) < 0.02 and c1 - c0 >= 0.2
    assert q1 >= q0 >= 0.0


def test_pass_in_few_tasks_sums_chunk_by_chunk_like_one_process(tmp_path):
    """A pass of 7 chunks in tasks of several chunks (2 per worker, at most MAX_CHUNKS_PER_TASK) gives the
    one-process pass's labels and float64 sums exactly: the chunks' sums are still added one by one in
    chunk order (engine._assign_pass is the reference)."""
    from protomine.mine import distributed as dist
    from protomine.mine.engine import ArraySource, _assign_pass
    X, W, _ = _synthetic(70, 3, 2)
    np.save(tmp_path / "X.npy", X)
    np.save(tmp_path / "W.npy", W)
    rng = np.random.default_rng(0)
    P = X[rng.choice(len(X), 3, replace=False)]
    V = np.ones((3,) + X.shape[2:], np.float32)
    src = dist.ExecutorSource(dist.NpySpec(str(tmp_path / "X.npy"), str(tmp_path / "W.npy")), InlineExecutor(),
                              cache_mb=0.0)
    chunks = src._items(10)
    tasks = src._tasks(chunks)
    assert len(tasks) == 2 and [c for t in tasks for c in t] == chunks        # 1 worker: 2 runs, all chunks in order
    got = src.assign_pass(P, V, (0.9, 1.0, 1.1), 10, True, 0)
    ref = _assign_pass(ArraySource(X, W), P, V, (0.9, 1.0, 1.1), 10, True, 0)
    for a, b in zip(got[:5], ref[:5]):
        assert np.array_equal(a, b)
    assert len(src.last_seconds) == len(src.last_cpu_seconds) == len(src.last_wait_seconds) == 2
    assert all(q >= 0 for q in src.last_wait_seconds)
    many = dist.ExecutorSource(src.spec, InlineExecutor(), tasks_per_worker=1)
    assert len(many._tasks(list(range(3 * dist.MAX_CHUNKS_PER_TASK + 1)))) == 4     # capped run length


_LARGE_BLOCKS_CHILD = """
import numpy as np
from protomine import cores

def in_heap(a):  # proc(5), /proc/[pid]/maps: the main arena's brk heap is "[heap]"
    addr = a.__array_interface__["data"][0]
    for line in open("/proc/self/maps"):
        if line.rstrip().endswith("[heap]"):
            lo, hi = (int(v, 16) for v in line.split()[0].split("-"))
            if lo <= addr < hi:
                return True
    return False

n = 48 * 2**20 // 8  # 48 MB: above 8 MB, below protomine's usual 64 MB
with cores.large_blocks_mapped(8 * 2**20) as changed:
    cores.return_free_memory()
    inside = np.ones(n)
cores.return_free_memory()
outside = np.ones(n)  # the 64 MB threshold again: the heap grows
print(bool(changed), in_heap(inside), in_heap(outside))
"""


@pytest.mark.skipif(__import__("platform").libc_ver()[0] != "glibc", reason="glibc's malloc")
def test_large_blocks_mapped_maps_large_blocks_on_their_own_only_within_the_block():
    # mallopt(3), M_MMAP_THRESHOLD: a request of at least the threshold that the heap's free memory cannot serve
    # gets its own mmap instead of growing the heap.  Run in a fresh interpreter: in the test process the heap
    # may already hold 48 MB of free memory left by earlier tests, which would serve the block either way.
    import subprocess
    import sys
    out = subprocess.run([sys.executable, "-c", _LARGE_BLOCKS_CHILD], capture_output=True, text=True, check=True)
    assert out.stdout.split() == ["True", "False", "True"]


def test_scratch_buffers_are_reused_per_thread_within_the_block_only():
    """``cores.scratch`` (common practice: a workspace reused across calls instead of fresh allocations): inside
    ``cores.reused_scratch`` a thread asking for the same name gets the same memory again (grown when a larger
    shape is asked for), another name or another thread other memory; outside, a fresh tensor each time; the
    buffers are dropped when the outermost block ends."""
    import threading

    import torch

    from protomine import cores
    a, b = cores.scratch("t", (4, 5)), cores.scratch("t", (4, 5))
    assert a.shape == (4, 5) and a.dtype == torch.float32 and a.data_ptr() != b.data_ptr()
    with cores.reused_scratch():
        x = cores.scratch("t", (4, 5))
        with cores.reused_scratch():
            assert cores.scratch("t", (2, 10)).data_ptr() == x.data_ptr()
            assert cores.scratch("u", (4, 5)).data_ptr() != x.data_ptr()
            assert cores.scratch("t", (3,), torch.bool).data_ptr() != x.data_ptr()
        assert cores.scratch("t", (20,)).data_ptr() == x.data_ptr()  # inner block ended, outer still open
        other = []
        th = threading.Thread(target=lambda: other.append(cores.scratch("t", (4, 5)).data_ptr()))
        th.start()
        th.join()
        assert other[0] != x.data_ptr()
        big = cores.scratch("t", (100, 100))
        assert big.shape == (100, 100) and cores.scratch("t", (100, 100)).data_ptr() == big.data_ptr()
    assert not cores._SCRATCH
