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
        self.alive: np.ndarray | None = None  # labels still in the catalogue (hnswlib cannot list the deleted ones)
        self.root: Path | None = None  # where it was loaded from, for messages

    def damaged(self, e: Exception):
        """hnswlib's own error on a graph file whose size is right but whose content is not."""
        from . import IndexDamaged

        where = self.root or "the index"
        return IndexDamaged(f"the graph in {where} answers inconsistently ({str(e).splitlines()[0][:60]}): it is damaged; "
                            f"run `trawl status --verify --index {where}`, then `trawl index ARCHIVE_DIR --index {where}` to repair it")

    # ----------------------------------------------------------- files
    @classmethod
    def load(cls, root: Path, dim: int, M: int, ef_construction: int, capacity: int, total: int,
             count: int | None = None, skip: frozenset = frozenset()) -> "ShardedGraph":
        """The shards in `root`: `count` of them when the catalogue records how many (a missing or
        skipped one, e.g. damaged, stands as an empty shard), else every file in sequence."""
        import hnswlib

        g = cls(dim, M, ef_construction, capacity)
        g.root = Path(root)
        k = 0
        while (k < count) if count is not None else (Path(root) / shard_file(k)).exists():
            path = Path(root) / shard_file(k)
            if k in skip or not path.exists():
                g._shard(k)
                k += 1
                continue
            s = hnswlib.Index(space="ip", dim=dim)
            room = min(capacity, max(total - k * capacity, 1000))
            try:
                s.load_index(str(path), max_elements=max(room, 1000))
            except (RuntimeError, OSError, MemoryError) as e:
                from . import IndexDamaged

                raise IndexDamaged(f"the graph file {path} is damaged ({str(e).splitlines()[0][:60]}): run "
                                   f"`trawl index ARCHIVE_DIR --index {Path(root)}` to repair it") from None
            g.shards.append(s)
            k += 1
        return g

    def save(self, root: Path, atomic_write_file) -> list[int]:
        """Write the shards that changed, each atomically (`atomic_write_file(path, writer)`); returns their numbers."""
        written = sorted(self.changed)
        for k in written:
            atomic_write_file(Path(root) / shard_file(k), self.shards[k].save_index)
        self.changed.clear()
        return written

    def remove(self, labels) -> None:
        """Take labels out of every future answer (hnswlib marks them deleted; the file keeps them)."""
        labels = np.asarray(labels, np.int64).reshape(-1)
        for lab in labels:
            k = int(lab // self.capacity)
            if k < len(self.shards):
                try:
                    self.shards[k].mark_deleted(int(lab))
                    self.changed.add(k)
                except RuntimeError:  # not in the graph (never merged, or already removed)
                    pass

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
            try:
                out[sel] = np.asarray(self.shards[int(k)].get_items(labels[sel]), np.float32).reshape(-1, self.dim)
            except (RuntimeError, IndexError) as e:
                raise self.damaged(e) from None
        return out

    def knn_query(self, queries: np.ndarray, k: int, num_threads: int = 1) -> tuple[np.ndarray, np.ndarray]:
        """(labels, distances), each (n, k), nearest first; distances are 1 - inner product."""
        queries = np.asarray(queries, np.float32).reshape(-1, self.dim)
        live = [s for s in self.shards if s.get_current_count()]
        if not live:
            raise ValueError("the graph is empty")

        def one(s):
            kk = min(k, s.get_current_count())
            try:
                return s.knn_query(queries, k=kk, num_threads=num_threads)
            except RuntimeError:  # asked for (nearly) every element: hnswlib finds fewer than k; answer exactly
                try:
                    return exact_knn(s, queries, kk, self.alive)
                except (RuntimeError, IndexError) as e:
                    raise self.damaged(e) from None

        if len(live) == 1:
            return one(live[0])
        if self._pool is None:
            self._pool = ThreadPoolExecutor(max_workers=min(len(live), os.cpu_count() or 1))
        parts = list(self._pool.map(one, live))
        labels = np.concatenate([p[0] for p in parts], axis=1)
        dist = np.concatenate([p[1] for p in parts], axis=1)
        order = np.argsort(dist, axis=1, kind="stable")[:, :k]
        return np.take_along_axis(labels, order, 1), np.take_along_axis(dist, order, 1)


def exact_knn(shard, queries: np.ndarray, k: int, alive: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Brute-force k nearest (inner product) over a shard's live elements (those in `alive`, when
    given), in knn_query's layout; fewer than k columns when the shard holds fewer."""
    ids = np.asarray(shard.get_ids_list(), np.int64)
    if alive is not None:
        ids = ids[np.isin(ids, alive)]
    vecs = np.asarray(shard.get_items(ids), np.float32).reshape(len(ids), -1) if len(ids) else np.zeros((0, queries.shape[1]), np.float32)
    sims = queries @ vecs.T
    kk = min(k, len(ids))
    order = np.argsort(-sims, axis=1, kind="stable")[:, :kk]
    return ids[order].astype(np.uint64), (1.0 - np.take_along_axis(sims, order, 1)).astype(np.float32)
