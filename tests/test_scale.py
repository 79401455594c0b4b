"""Scale-out: executors, the sharded store, distributed ingest and mining on a 2-worker LocalCluster,
mini-batch mining.  The cluster binds to 127.0.0.1 only and is shared by the module, then closed."""
from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from protomine.config import load_config
from protomine.errors import InputError
from protomine.ingest.pipeline import ingest_captures
from protomine.ingest.sharded import capture_groups, ingest_sharded
from protomine.ingest.store import ObjectStore
from protomine.scale.executor import DaskExecutor, InlineExecutor, make_executor
from protomine.scale.shards import ShardedObjectStore, is_index



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


def test_make_executor_from_config_and_flags():
    cfg = load_config(None)
    assert isinstance(make_executor(cfg), InlineExecutor)  # the default runs in this process
    with pytest.raises(InputError, match="scheduler address"):
        make_executor(cfg, scheduler="not an address")


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
    sharded, single = ObjectStore(store), ObjectStore(tiny_world["store"])
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
    st = ObjectStore(store)
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
