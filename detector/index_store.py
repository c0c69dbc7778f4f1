"""The index folder: an HNSW graph of window vectors plus a catalogue of broadcasts.

Layout of INDEX_DIR:
    trawl-index.json   what made the index: format version, model card hash, features, windows
    catalog.sqlite     broadcasts (path, content hash, duration, ...) and their windows
    pending/ID.npy     vectors of finished broadcasts not yet merged into the graph
    letters/LABEL.npy  per broadcast, its letter posteriors (uint8, detector/letters.py), when the
                       models have a letter head; LABEL is the broadcast's first window label
    graph.hnsw         hnswlib graph of the merged vectors (replaced atomically); an index past
    graph-K.hnsw       SHARD_CAPACITY windows continues in further shards (detector/graph.py)
    calibration.json, rules.txt, query_map.json   query-side settings (optional)

Every write is atomic (temporary file, then os.replace) and every broadcast is committed
in one sqlite transaction after its vectors are on disk, so a run killed at any moment
leaves a usable index of the broadcasts that finished; the next run merges what is pending
and carries on.
"""

from __future__ import annotations

import json
import os
import sqlite3
import tempfile
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import TrawlError
from .graph import SHARD_CAPACITY, ShardedGraph

FORMAT_VERSION = 2
MANIFEST = "trawl-index.json"
HNSW_M = 16  # level-0 links 2M: 8 was too few for high recall on a 100-hour index
HNSW_EF_CONSTRUCTION = 120
UNSHARDED = 2**62  # shard capacity of indexes written before shards existed

SCHEMA = """
create table if not exists broadcasts (
  id integer primary key,
  path text unique not null,
  sha256 text not null,
  duration real not null,
  speech_seconds real not null,
  first_label integer not null,
  n_windows integer not null,
  starts blob not null,
  kinds blob not null,
  indexed_at text not null,
  in_graph integer not null default 0
);
create table if not exists failures (path text primary key, error text, at text);
create table if not exists meta (key text primary key, value text);
"""


def atomic_write_with(path: Path, write) -> None:
    """Atomic write by a function that writes a file at the path it is given (hnswlib's save_index,
    or `atomic_write`'s writer): a temporary file beside `path`, then os.replace."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.close(fd)
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)


def atomic_write(path: Path, data: bytes) -> None:
    def write(tmp: str) -> None:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())

    atomic_write_with(path, write)


def _npy(a: np.ndarray) -> bytes:
    import io

    buf = io.BytesIO()
    np.save(buf, a)
    return buf.getvalue()


def now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


class Index:
    def __init__(self, root: Path, manifest: dict):
        self.root = Path(root)
        self.manifest = manifest
        self.dim = int(manifest["dim"])
        self.windows = [tuple(w) for w in manifest["windows"]]
        self.db = sqlite3.connect(str(self.root / "catalog.sqlite"), isolation_level=None)
        self.db.executescript(SCHEMA)
        self._graph = None

    # --------------------------------------------------------------- opening
    @classmethod
    def create_or_open(cls, root: Path, models) -> "Index":
        root = Path(root)
        man_path = root / MANIFEST
        if man_path.exists():
            idx = cls.open(root)
            idx.check_models(models)
            return idx
        if root.exists() and any(p for p in root.iterdir() if not p.name.startswith(".")):
            raise TrawlError(f"{root} exists and is not a Trawl index: choose an empty or new folder")
        root.mkdir(parents=True, exist_ok=True)
        (root / "pending").mkdir(exist_ok=True)
        (root / "letters").mkdir(exist_ok=True)
        manifest = {
            "format_version": FORMAT_VERSION,
            "model_card_sha256": models.card_hash,
            "model_name": models.card.get("name"),
            "features": models.card["features"],
            "frame_seconds": models.card["frame_seconds"],
            "windows": [list(w) for w in models.windows],
            "dim": models.dim,
            "letters": (models.card.get("letters") or {}).get("alphabet"),
            "hnsw": {"space": "ip", "M": HNSW_M, "ef_construction": HNSW_EF_CONSTRUCTION,
                     "shard_capacity": SHARD_CAPACITY},
            "created": now(),
        }
        idx = cls(root, manifest)
        atomic_write(man_path, json.dumps(manifest, indent=1).encode())
        return idx

    @classmethod
    def open(cls, root: Path) -> "Index":
        root = Path(root)
        man_path = root / MANIFEST
        if not man_path.exists():
            raise TrawlError(f"no Trawl index at {root} (run `trawl index ARCHIVE_DIR --index {root}` first)")
        try:
            manifest = json.loads(man_path.read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as e:
            raise TrawlError(f"the index description {man_path} is unreadable ({e})") from None
        if manifest.get("format_version") != FORMAT_VERSION:
            raise TrawlError(f"the index at {root} has format version {manifest.get('format_version')}, "
                             f"this program reads version {FORMAT_VERSION}")
        (root / "pending").mkdir(exist_ok=True)
        (root / "letters").mkdir(exist_ok=True)
        return cls(root, manifest)

    def check_models(self, models) -> None:
        if self.manifest["model_card_sha256"] != models.card_hash:
            raise TrawlError(f"the index at {self.root} was made with another model "
                             f"(card {self.manifest['model_card_sha256'][:12]}, installed {models.card_hash[:12]}); "
                             "search it with that model or index into a new folder")

    def set_archive(self, archive: Path) -> None:
        """Remember where the archive was (for listening clips); paths inside stay relative."""
        self.manifest["archive"] = str(Path(archive).resolve())
        atomic_write(self.root / MANIFEST, json.dumps(self.manifest, indent=1).encode())

    # --------------------------------------------------------------- catalogue
    def known(self, rel_path: str) -> tuple[int, str] | None:
        row = self.db.execute("select id, sha256 from broadcasts where path=?", (rel_path,)).fetchone()
        return (row[0], row[1]) if row else None

    def next_label(self) -> int:
        """Labels are never reused, even those of a broadcast re-indexed after its content changed."""
        row = self.db.execute("select max(first_label + n_windows) from broadcasts").fetchone()
        kept = self.db.execute("select value from meta where key='next_label'").fetchone()
        return max(row[0] or 0, int(kept[0]) if kept else 0)

    def add_broadcast(self, rel_path: str, sha256: str, duration: float, speech_seconds: float,
                      starts: np.ndarray, kinds: np.ndarray, vectors: np.ndarray,
                      letters: np.ndarray | None = None) -> None:
        """Commit one finished broadcast: vectors to pending/ (and letter posteriors to letters/),
        then one catalogue transaction."""
        old = self.known(rel_path)
        label = self.next_label()
        tmp_name = f"{sha256[:16]}-{label}.npy"
        if letters is not None:
            atomic_write(self.root / "letters" / f"{label}.npy", _npy(letters.astype(np.uint8)))
        atomic_write(self.root / "pending" / tmp_name, _npy(vectors.astype(np.float32)))
        cur = self.db.cursor()
        cur.execute("begin immediate")
        try:
            if old is not None:  # changed content: the old windows are dropped
                cur.execute("delete from broadcasts where id=?", (old[0],))
            cur.execute("insert or replace into meta(key, value) values('next_label', ?)", (str(label + len(vectors)),))
            cur.execute(
                "insert into broadcasts(path, sha256, duration, speech_seconds, first_label, n_windows, starts, kinds,"
                " indexed_at, in_graph) values (?,?,?,?,?,?,?,?,?,0)",
                (rel_path, sha256, duration, speech_seconds, label, len(vectors), starts.astype(np.int32).tobytes(),
                 kinds.astype(np.uint8).tobytes(), now()))
            cur.execute("delete from failures where path=?", (rel_path,))
            cur.execute("commit")
        except BaseException:
            cur.execute("rollback")
            raise

    def record_failure(self, rel_path: str, error: str) -> None:
        self.db.execute("insert or replace into failures(path, error, at) values (?,?,?)", (rel_path, error, now()))

    def broadcasts(self) -> list[dict]:
        cols = ["id", "path", "sha256", "duration", "speech_seconds", "first_label", "n_windows", "indexed_at", "in_graph"]
        rows = self.db.execute(f"select {', '.join(cols)} from broadcasts order by first_label").fetchall()
        return [dict(zip(cols, r)) for r in rows]

    def total_seconds(self) -> float:
        return float(self.db.execute("select coalesce(sum(duration), 0) from broadcasts").fetchone()[0])

    # --------------------------------------------------------------- graph
    def _pending_files(self) -> dict[int, Path]:
        """first_label -> pending vector file, for committed broadcasts not yet in the graph."""
        out = {}
        for f in (self.root / "pending").glob("*.npy"):
            try:
                out[int(f.stem.rsplit("-", 1)[1])] = f
            except (IndexError, ValueError):
                continue
        return out

    def load_graph(self, merge_pending: bool = True) -> ShardedGraph:
        """The HNSW graph with every committed broadcast in it (pending ones added in memory)."""
        if self._graph is not None:
            return self._graph
        h = self.manifest["hnsw"]
        # an index made before shards has one graph of any size: it stays one shard
        g = ShardedGraph.load(self.root, self.dim, h["M"], h["ef_construction"],
                              int(h.get("shard_capacity", UNSHARDED)), self.next_label())
        if merge_pending:
            self._add_pending(g)
        self._graph = g
        return g

    def _add_pending(self, g: ShardedGraph) -> list[int]:
        pend = self._pending_files()
        added = []
        for row in self.db.execute("select first_label, n_windows from broadcasts where in_graph=0").fetchall():
            f = pend.get(row[0])
            if f is None or row[1] == 0:
                added.append(row[0])
                continue
            vec = np.load(f)
            g.add_items(vec, np.arange(row[0], row[0] + len(vec)), num_threads=2)
            added.append(row[0])
        return added

    def merge(self) -> int:
        """Merge pending vectors into the graph's shards (each file replaced atomically) and clear
        them. Returns windows merged. A run killed between two shard files re-adds the same
        labels next time, which hnswlib treats as updates."""
        g = self.load_graph(merge_pending=False)
        before = g.get_current_count()
        added = self._add_pending(g)
        if not added:
            return 0
        g.save(self.root, atomic_write_with)
        self.db.execute("update broadcasts set in_graph=1 where in_graph=0")
        self._drop_stale_pending()
        self._drop_stale_letters()
        return g.get_current_count() - before

    def _drop_stale_pending(self) -> None:
        """Delete pending vector files that no unmerged, committed broadcast refers to."""
        live = {r[0] for r in self.db.execute("select first_label from broadcasts where in_graph=0")}
        for label, f in self._pending_files().items():
            if label not in live:
                f.unlink(missing_ok=True)

    def _drop_stale_letters(self) -> None:
        """Delete letter files no committed broadcast refers to (a killed run's, a re-indexed broadcast's old one)."""
        live = {r[0] for r in self.db.execute("select first_label from broadcasts")}
        for f in (self.root / "letters").glob("*.npy"):
            if not f.stem.isdigit() or int(f.stem) not in live:
                f.unlink(missing_ok=True)

    def clean_orphans(self) -> None:
        """Remove pending files of broadcasts whose commit never happened (a killed run)."""
        self._drop_stale_pending()
        self._drop_stale_letters()
        for folder in (self.root, self.root / "pending", self.root / "letters"):
            for f in folder.glob(".*.tmp"):
                f.unlink(missing_ok=True)

    # --------------------------------------------------------------- lookups
    def window_table(self):
        """Arrays for label -> (broadcast, start, end): sorted first labels and per-broadcast spans."""
        rows = self.db.execute("select path, first_label, n_windows, starts, kinds from broadcasts order by first_label").fetchall()
        firsts = np.array([r[1] for r in rows], np.int64)
        counts = np.array([r[2] for r in rows], np.int64)
        spans = [(np.frombuffer(r[3], np.int32), np.frombuffer(r[4], np.uint8)) for r in rows]
        return [r[0] for r in rows], firsts, counts, spans

    def letters(self, first_label: int) -> np.ndarray | None:
        """The stored letter posteriors (uint8, memory-mapped) of the broadcast whose first label is given."""
        p = self.root / "letters" / f"{int(first_label)}.npy"
        return np.load(p, mmap_mode="r") if p.exists() else None

    def vectors(self, labels: np.ndarray) -> np.ndarray:
        g = self.load_graph()
        return np.asarray(g.get_items(np.asarray(labels, np.int64)), dtype=np.float32).reshape(-1, self.dim)

    # --------------------------------------------------------------- settings files
    def read_setting(self, name: str) -> dict | None:
        p = self.root / name
        if not p.exists():
            return None
        try:
            return json.loads(p.read_text(encoding="utf-8"))
        except json.JSONDecodeError as e:
            raise TrawlError(f"{p} is damaged ({e})") from None

    def read_text(self, name: str) -> str | None:
        p = self.root / name
        return p.read_text(encoding="utf-8") if p.exists() else None

    def write_text(self, name: str, text: str | None) -> None:
        p = self.root / name
        if text is None:
            p.unlink(missing_ok=True)
        else:
            atomic_write(p, text.encode("utf-8"))

    def write_setting(self, name: str, obj: dict | None) -> None:
        p = self.root / name
        if obj is None:
            p.unlink(missing_ok=True)
        else:
            atomic_write(p, (json.dumps(obj, indent=1, ensure_ascii=False) + "\n").encode())

    def close(self):
        self.db.close()
