"""The window graph: HNSW shards (hnswlib) searched together as one index.

Labels are window numbers, given out in order; label L lives in shard L // capacity. A
shard is one hnswlib file (shard 0 `graph.hnsw`, shard k `graph-k.hnsw`), so adding a
broadcast rewrites only the last shard, not the whole archive's graph. A query runs on
every shard (in parallel threads: hnswlib releases the GIL while it searches) and the
shards' answers are merged by distance, which gives the same k nearest as one graph
whenever each shard finds its own nearest ones.

HNSW: Malkov & Yashunin, "Efficient and robust approximate nearest neighbor search
using Hierarchical Navigable Small World graphs", IEEE TPAMI 2020.
"""

from __future__ import annotations

import math
import os
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np

SHARD_CAPACITY = 3_500_000  # windows per shard: about 53 hours of speech at 65,000 windows an hour
# Query effort: ef at least EF_WORST_CASE * (shard size / 1e6) ** EF_GROWTH. Measured on the hardest
# case, random unit vectors in 64 dimensions (tests/benchmarks/bench_search.py): at M=16 this
# finds >= 0.98 of the true 100 nearest at 1e6 (ef 8000) and 3.3e6 (ef 12,000) vectors a shard.
EF_WORST_CASE = 8000
EF_GROWTH = 0.34


def shard_file(k: int) -> str:
    return "graph.hnsw" if k == 0 else f"graph-{k}.hnsw"


def query_ef(k: int, shard_size: int) -> int:
    """The ef a k-nearest query uses on shards of `shard_size` vectors."""
    worst = EF_WORST_CASE * (max(shard_size, 1) / 1e6) ** EF_GROWTH
    return int(max(k + 50, 400, min(math.ceil(worst), 4 * EF_WORST_CASE)))


class ShardedGraph:
    def __init__(self, dim: int, M: int, ef_construction: int, capacity: int = SHARD_CAPACITY):
        self.dim, self.M, self.ef_construction, self.capacity = dim, M, ef_construction, int(capacity)
        self.shards: list = []
        self.changed: set[int] = set()
        self._pool: ThreadPoolExecutor | None = None

    # ----------------------------------------------------------- files
    @classmethod
    def load(cls, root: Path, dim: int, M: int, ef_construction: int, capacity: int, total: int) -> "ShardedGraph":
        import hnswlib

        g = cls(dim, M, ef_construction, capacity)
        k = 0
        while (Path(root) / shard_file(k)).exists():
            s = hnswlib.Index(space="ip", dim=dim)
            room = min(capacity, max(total - k * capacity, 1000))
            s.load_index(str(Path(root) / shard_file(k)), max_elements=max(room, 1000))
            g.shards.append(s)
            k += 1
        return g

    def save(self, root: Path, atomic_write_file) -> None:
        """Write the shards that changed, each atomically (`atomic_write_file(path, writer)`)."""
        for k in sorted(self.changed):
            atomic_write_file(Path(root) / shard_file(k), self.shards[k].save_index)
        self.changed.clear()

    # ----------------------------------------------------------- building
    def _shard(self, k: int):
        import hnswlib

        while len(self.shards) <= k:
            s = hnswlib.Index(space="ip", dim=self.dim)
            s.init_index(max_elements=1000, M=self.M, ef_construction=self.ef_construction, random_seed=7)
            self.shards.append(s)
        return self.shards[k]

    def add_items(self, vectors: np.ndarray, labels: np.ndarray, num_threads: int = 2) -> None:
        labels = np.asarray(labels, np.int64)
        which = labels // self.capacity
        for k in np.unique(which):
            sel = which == k
            s = self._shard(int(k))
            need = s.get_current_count() + int(sel.sum())
            if need > s.get_max_elements():
                s.resize_index(min(self.capacity, max(need, int(s.get_max_elements() * 1.5))))
            s.add_items(vectors[sel], labels[sel], num_threads=num_threads)
            self.changed.add(int(k))

    # ----------------------------------------------------------- queries
    def get_current_count(self) -> int:
        return sum(s.get_current_count() for s in self.shards)

    def largest_shard(self) -> int:
        return max((s.get_current_count() for s in self.shards), default=0)

    def set_ef(self, ef: int) -> None:
        for s in self.shards:
            s.set_ef(int(ef))

    def get_items(self, labels) -> np.ndarray:
        labels = np.asarray(labels, np.int64).reshape(-1)
        out = np.zeros((len(labels), self.dim), np.float32)
        which = labels // self.capacity
        for k in np.unique(which):
            sel = which == k
            out[sel] = np.asarray(self.shards[int(k)].get_items(labels[sel]), np.float32).reshape(-1, self.dim)
        return out

    def knn_query(self, queries: np.ndarray, k: int, num_threads: int = 1) -> tuple[np.ndarray, np.ndarray]:
        """(labels, distances), each (n, k), nearest first; distances are 1 - inner product."""
        queries = np.asarray(queries, np.float32).reshape(-1, self.dim)
        live = [s for s in self.shards if s.get_current_count()]
        if not live:
            raise ValueError("the graph is empty")

        def one(s):
            return s.knn_query(queries, k=min(k, s.get_current_count()), num_threads=num_threads)

        if len(live) == 1:
            return one(live[0])
        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=min(len(live), os.cpu_count() or 1))
        parts = list(self._pool.map(one, live))
        labels = np.concatenate([p[0] for p in parts], axis=1)
        dist = np.concatenate([p[1] for p in parts], axis=1)
        order = np.argsort(dist, axis=1, kind="stable")[:, :k]
        return np.take_along_axis(labels, order, 1), np.take_along_axis(dist, order, 1)
