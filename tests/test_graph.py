"""The sharded window graph (detector/graph.py) against exact brute-force numpy search."""

import numpy as np
import pytest

from detector.graph import ShardedGraph, query_ef, shard_file
from detector.index_store import atomic_write_with


def unit_rows(n, d, seed):
    x = np.random.default_rng(seed).standard_normal((n, d)).astype(np.float32)
    return x / np.linalg.norm(x, axis=1, keepdims=True)


def exact(queries, vectors, k):
    """Reference: labels of the k largest inner products, by brute force."""
    return np.argsort(-(queries @ vectors.T), axis=1, kind="stable")[:, :k]


@pytest.fixture(scope="module")
def built():
    vecs = unit_rows(3000, 16, 1)
    g = ShardedGraph(16, M=16, ef_construction=200, capacity=800)  # 4 shards
    g.add_items(vecs[:1700], np.arange(1700))
    g.add_items(vecs[1700:], np.arange(1700, 3000))
    return g, vecs


def test_labels_go_to_their_shards_and_come_back(built):
    g, vecs = built
    assert len(g.shards) == 4 and [s.get_current_count() for s in g.shards] == [800, 800, 800, 600]
    assert g.get_current_count() == 3000 and g.largest_shard() == 800
    labels = np.array([0, 799, 800, 2999, 1234])
    np.testing.assert_allclose(g.get_items(labels), vecs[labels], atol=1e-6)


def test_merged_shards_find_the_exact_nearest_neighbours(built):
    g, vecs = built
    queries = unit_rows(20, 16, 2)
    g.set_ef(400)
    labels, dist = g.knn_query(queries, k=50)
    truth = exact(queries, vecs, 50)
    recall = np.mean([len(set(a) & set(b)) / 50 for a, b in zip(labels.tolist(), truth.tolist())])
    assert recall >= 0.99
    assert np.all(np.diff(dist, axis=1) >= -1e-6)  # nearest first across shards
    np.testing.assert_allclose(1 - dist[:, 0], np.sum(queries * vecs[labels[:, 0]], axis=1), atol=1e-5)


def test_only_changed_shards_are_rewritten(built, tmp_path):
    g, vecs = built
    g.changed = {0, 1, 2, 3}
    g.save(tmp_path, atomic_write_with)
    assert sorted(p.name for p in tmp_path.iterdir()) == sorted(shard_file(k) for k in range(4))
    again = ShardedGraph.load(tmp_path, 16, 16, 200, 800, total=3000)
    assert again.get_current_count() == 3000
    before = {k: (tmp_path / shard_file(k)).stat().st_mtime_ns for k in range(4)}
    again.add_items(unit_rows(10, 16, 3), np.arange(3000, 3010))  # the last shard only
    again.save(tmp_path, atomic_write_with)
    after = {k: (tmp_path / shard_file(k)).stat().st_mtime_ns for k in range(4)}
    assert [before[k] == after[k] for k in range(4)] == [True, True, True, False]
    assert not list(tmp_path.glob(".*.tmp"))


def test_query_effort_grows_with_the_shard_and_covers_k():
    assert query_ef(1600, 1000) == 1650  # small index: the candidates asked for decide
    assert query_ef(100, 1_000_000) == 8000  # the measured point for 1e6 vectors a shard
    assert 11_000 <= query_ef(100, 3_300_000) <= 13_000


def test_an_index_made_before_shards_stays_one_graph(tmp_path):
    """Indexes written before shards have no shard capacity in their manifest: however many
    windows they hold, every label stays in the one graph file."""
    from detector.index_store import UNSHARDED

    vecs = unit_rows(50, 8, 4)
    g = ShardedGraph(8, 16, 100, capacity=UNSHARDED)
    g.add_items(vecs, np.arange(50))
    g.save(tmp_path, atomic_write_with)
    again = ShardedGraph.load(tmp_path, 8, 16, 100, UNSHARDED, total=50)
    assert len(again.shards) == 1 and [p.name for p in tmp_path.iterdir()] == ["graph.hnsw"]
    np.testing.assert_allclose(again.get_items(np.arange(50)), vecs, atol=1e-6)


def test_asking_for_every_element_answers_as_brute_force_does():
    """`--top 3000` on a small index asks for about every stored window, more than hnswlib's search
    can return (one is removed): the answer falls back to exact search, checked against numpy."""
    vecs = unit_rows(60, 8, 5)
    g = ShardedGraph(8, 16, 100, capacity=40)
    g.add_items(vecs, np.arange(60))
    g.remove([7])
    g.alive = np.setdiff1d(np.arange(60), [7])
    q = unit_rows(1, 8, 6)
    labels, dist = g.knn_query(q, k=59)
    ref = np.argsort(-(vecs @ q[0]), kind="stable")
    ref = ref[ref != 7]
    assert labels[0].astype(int).tolist() == ref.tolist()
    np.testing.assert_allclose(dist[0], 1 - vecs[ref] @ q[0], atol=1e-5)
