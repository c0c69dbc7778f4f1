"""The index folder: an HNSW graph of window vectors plus a catalogue of broadcasts.

Layout of INDEX_DIR:
    trawl-index.json   what made the index: format version, model card hash, features, windows
    catalog.sqlite     broadcasts (path, content hash, duration, ...) and their windows
    pending/bID.npy    vectors of finished broadcasts not yet merged into the graph
    letters/bID.npy    per broadcast, its letter posteriors (uint8, detector/letters.py), when the
                       models have a letter head. ID is the broadcast's catalogue id, never reused
                       (indexes made before ids named files by first window label: still read)
    graph.hnsw         hnswlib graph of the merged vectors (replaced atomically); an index past
    graph-K.hnsw       SHARD_CAPACITY windows continues in further shards (detector/graph.py)
    calibration.json, rules.txt, query_map.json   query-side settings (optional)

    .writer.lock       held (flock) by the one command writing the catalogue and graph; names it
    .settings.lock     the same for commands writing the query-side settings
    .snapshot.lock     shared by readers while they open the index, exclusive for a writer's
                       short commits: a reader sees the last finished state, never a half of one

Every write is atomic (temporary file, then os.replace) and every broadcast is committed
in one sqlite transaction after its vectors are on disk, so a run killed at any moment
leaves a usable index of the broadcasts that finished; the next run merges what is pending
and carries on. Files are written with the user's umask. The sizes and SHA-256 of the files
are recorded when they are written (`detector/integrity.py` checks them).
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import socket
import sqlite3
import sys
import tempfile
import threading
import time
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path

import numpy as np

from . import IndexBusy, IndexDamaged, TrawlError
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
create table if not exists excluded (path text primary key, at text);
"""
# columns added since the first release (an older catalogue gains them when a writer opens it)
ADDED_COLUMNS = {"letters_bytes": "integer", "letters_sha256": "text", "vectors_bytes": "integer", "vectors_sha256": "text"}
_umask_lock = threading.Lock()


class CatalogueDamaged(IndexDamaged):
    """The sqlite catalogue cannot be read: `trawl index` sets it aside and indexes the archive again."""


def file_mode() -> int:
    """The mode a new file gets under the process's umask (mkstemp's own 0600 ignores it)."""
    with _umask_lock:
        mask = os.umask(0)
        os.umask(mask)
    return 0o666 & ~mask


def sha256_file(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


# ------------------------------------------------------------------ locks
LOCK_FILES = (".writer.lock", ".settings.lock", ".snapshot.lock")
_held: dict[str, list] = {}  # lock file -> [fd, depth]: a command that calls another (adapt -> calibrate) re-enters


@contextmanager
def file_lock(path: Path, what: str, wait: bool = False):
    """Hold an exclusive flock on `path` (one writer per index). Another holder makes this wait
    (`wait=True`) or refuse with IndexBusy naming it (the lock file records pid, host, command)."""
    key = str(Path(path).resolve())
    if key in _held:
        _held[key][1] += 1
        try:
            yield
        finally:
            _held[key][1] -= 1
        return
    fd = os.open(key, os.O_RDWR | os.O_CREAT, 0o666)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | (0 if wait else fcntl.LOCK_NB))
        except BlockingIOError:
            holder = os.pread(fd, 4096, 0).decode("utf-8", "replace").strip() or "another process"
            raise IndexBusy(f"{Path(path).parent} is being written by {holder}; wait for it to finish "
                            f"(or add --wait to queue behind it), then run this again") from None
        os.ftruncate(fd, 0)
        cmd = " ".join(["trawl"] + sys.argv[1:3]) if sys.argv and sys.argv[0].endswith("trawl") else what
        os.pwrite(fd, f"{cmd} (pid {os.getpid()} on {socket.gethostname()}, since {now()})".encode(), 0)
        _held[key] = [fd, 1]
        try:
            yield
        finally:
            del _held[key]
            os.ftruncate(fd, 0)
    finally:
        os.close(fd)  # closing releases the flock


@contextmanager
def shared_lock(path: Path, exclusive: bool = False):
    """flock on the snapshot lock: shared for readers opening the index, exclusive for a writer's
    commit. Best effort: a reader that cannot open the lock file (a read-only copy) goes on without."""
    try:
        fd = os.open(str(path), os.O_RDWR | os.O_CREAT, 0o666) if exclusive else os.open(str(path), os.O_RDONLY)
    except OSError:
        yield
        return
    try:
        fcntl.flock(fd, fcntl.LOCK_EX if exclusive else fcntl.LOCK_SH)
        yield
    finally:
        os.close(fd)


def atomic_write_with(path: Path, write) -> None:
    """Atomic write by a function that writes a file at the path it is given (hnswlib's save_index,
    or `atomic_write`'s writer): a temporary file beside `path`, then os.replace."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    os.close(fd)
    try:
        write(tmp)
        os.chmod(tmp, file_mode())
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
    """An open index. Readers open it read-only (`Index.open`: nothing is created or changed);
    writers hold `lock()` and open it with `Index.open(root, write=True)` or `create_or_open`."""

    def __init__(self, root: Path, manifest: dict, write: bool = False):
        self.root = Path(root)
        self.manifest = manifest
        self.dim = int(manifest["dim"])
        self.windows = [tuple(w) for w in manifest["windows"]]
        self.writable = write
        cat = self.root / "catalog.sqlite"
        if write:
            if not cat.exists() and (any(self.root.glob("graph*.hnsw")) or any(self.root.glob("letters/*.npy"))):
                raise CatalogueDamaged(f"the catalogue {cat} is missing")  # its files can no longer be told apart
            for sub in ("pending", "letters"):
                (self.root / sub).mkdir(exist_ok=True)
            new = not cat.exists()
            self.db = sqlite3.connect(str(cat), isolation_level=None)
            self.db.execute("pragma busy_timeout = 60000")
            try:
                self.db.executescript(SCHEMA)
                have = {r[1] for r in self.db.execute("pragma table_info(broadcasts)")}
                for col, kind in ADDED_COLUMNS.items():
                    if col not in have:
                        self.db.execute(f"alter table broadcasts add column {col} {kind}")
                if new:  # sqlite creates it 0644 & ~umask: the user's umask decides, as for every other file
                    os.chmod(cat, file_mode())
            except sqlite3.DatabaseError as e:
                self.db.close()
                raise self.damaged_catalogue(e) from None
        else:
            if not cat.exists():
                raise CatalogueDamaged(f"the catalogue {cat} is missing: run `trawl index ARCHIVE_DIR --index {self.root}` to rebuild it")
            from urllib.parse import quote

            self.db = sqlite3.connect(f"file:{quote(str(cat))}?mode=ro", uri=True, isolation_level=None)
            self.db.execute("pragma busy_timeout = 60000")
        self._graph = None
        self._columns = None

    def damaged_catalogue(self, e: Exception) -> IndexDamaged:
        return CatalogueDamaged(f"the catalogue {self.root / 'catalog.sqlite'} is damaged ({str(e).splitlines()[0]}): "
                            f"run `trawl index ARCHIVE_DIR --index {self.root}` to rebuild the index")

    def q(self, sql: str, args=()) -> list:
        """Rows of a catalogue query; a damaged catalogue is an IndexDamaged error, not sqlite's own."""
        try:
            return self.db.execute(sql, args).fetchall()
        except sqlite3.OperationalError as e:
            if self.writable or "readonly" not in str(e) or not os.access(self.root, os.W_OK):
                raise self.damaged_catalogue(e) from None
            # a run killed mid-commit left a journal that only a writable connection can roll back
            self.db.close()
            self.db = sqlite3.connect(str(self.root / "catalog.sqlite"), isolation_level=None)
            self.db.execute("pragma busy_timeout = 60000")
            return self.q(sql, args)
        except sqlite3.DatabaseError as e:
            raise self.damaged_catalogue(e) from None

    # --------------------------------------------------------------- opening and locks
    def lock(self, what: str = "index", wait: bool = False):
        """One writer at a time: 'index' for the catalogue and graph, 'settings' for the query side."""
        return file_lock(self.root / (".writer.lock" if what == "index" else f".{what}.lock"), what, wait)

    def snapshot(self, exclusive: bool = False):
        """Readers open the index inside snapshot(); a writer commits inside snapshot(exclusive=True)."""
        return shared_lock(self.root / ".snapshot.lock", exclusive)

    @classmethod
    def create_or_open(cls, root: Path, models) -> "Index":
        root = Path(root)
        man_path = root / MANIFEST
        if man_path.exists():
            idx = cls.open(root, write=True)
            idx.check_models(models)
            return idx
        if root.exists() and not root.is_dir():
            raise TrawlError(f"{root} is a file, not an index folder: choose an empty or new folder")
        if root.exists() and any(p for p in root.iterdir() if not p.name.startswith(".")):
            raise TrawlError(f"{root} exists and is not a Trawl index: choose an empty or new folder")
        root.mkdir(parents=True, exist_ok=True)
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
        for lock in LOCK_FILES:  # made once, so that taking a lock later adds no file
            os.close(os.open(str(root / lock), os.O_RDWR | os.O_CREAT, 0o666))
        # the description first: a run killed before its catalogue exists leaves a folder the next run continues
        atomic_write(man_path, json.dumps(manifest, indent=1).encode())
        return cls(root, manifest, write=True)

    @classmethod
    def read_manifest(cls, root: Path) -> dict:
        root = Path(root)
        if root.exists() and not root.is_dir():
            raise TrawlError(f"{root} is a file, not an index folder (give the folder `trawl index` made)")
        man_path = root / MANIFEST
        if not man_path.exists():
            raise TrawlError(f"no Trawl index at {root} (run `trawl index ARCHIVE_DIR --index {root}` first)")
        try:
            manifest = json.loads(man_path.read_text(encoding="utf-8"))
            int(manifest["dim"]), list(manifest["windows"])
        except (OSError, ValueError, KeyError, TypeError) as e:
            raise IndexDamaged(f"the index description {man_path} is damaged ({str(e).splitlines()[0] if str(e) else type(e).__name__}); "
                               f"index the archive into a new folder") from None
        if manifest.get("format_version") != FORMAT_VERSION:
            raise TrawlError(f"the index at {root} has format version {manifest.get('format_version')}, "
                             f"this program reads version {FORMAT_VERSION}")
        return manifest

    @classmethod
    def open(cls, root: Path, write: bool = False) -> "Index":
        return cls(Path(root), cls.read_manifest(root), write=write)

    def check_models(self, models) -> None:
        self.check_manifest(self.manifest, self.root, models)

    @staticmethod
    def check_manifest(manifest: dict, root: Path, models) -> None:
        if manifest["model_card_sha256"] != models.card_hash:
            archive = manifest.get("archive") or "ARCHIVE_DIR"
            raise TrawlError(f"the index at {root} was made with another model "
                             f"(card {manifest['model_card_sha256'][:12]}, installed {models.card_hash[:12]}): "
                             f"re-index it with `trawl index {archive} --index {root} --reindex` "
                             "(spelling rules and learned rules carry over; calibrate again afterwards)")

    def set_archive(self, archive: Path) -> None:
        """Remember where the archive was (for listening clips); paths inside stay relative."""
        where = str(Path(archive).resolve())
        if self.manifest.get("archive") != where:
            self.manifest["archive"] = where
            atomic_write(self.root / MANIFEST, json.dumps(self.manifest, indent=1).encode())

    # --------------------------------------------------------------- catalogue
    def known(self, rel_path: str) -> tuple[int, str] | None:
        rows = self.q("select id, sha256 from broadcasts where path=?", (rel_path,))
        return (rows[0][0], rows[0][1]) if rows else None

    def next_label(self) -> int:
        """Labels are never reused, even those of a broadcast re-indexed after its content changed."""
        row = self.q("select max(first_label + n_windows) from broadcasts")[0]
        kept = self.q("select value from meta where key='next_label'")
        return max(row[0] or 0, int(kept[0][0]) if kept else 0)

    def next_id(self) -> int:
        """Broadcast ids, which name a broadcast's files, are never reused either."""
        row = self.q("select max(id) from broadcasts")[0]
        kept = self.q("select value from meta where key='next_id'")
        return max((row[0] or 0) + 1, int(kept[0][0]) if kept else 1)

    def letters_path(self, b: dict) -> Path:
        """A broadcast's letters file (by id; an index made before ids named it by first label)."""
        p = self.root / "letters" / f"b{b['id']}.npy"
        if not p.exists() and b.get("n_windows"):
            old = self.root / "letters" / f"{b['first_label']}.npy"
            if old.exists():
                return old
        return p

    def pending_path(self, b: dict) -> Path:
        p = self.root / "pending" / f"b{b['id']}.npy"
        if not p.exists() and b.get("n_windows"):
            old = sorted((self.root / "pending").glob(f"{b['sha256'][:16]}-{b['first_label']}.npy"))
            if old:
                return old[0]
        return p

    def add_broadcast(self, rel_path: str, sha256: str, duration: float, speech_seconds: float,
                      starts: np.ndarray, kinds: np.ndarray, vectors: np.ndarray,
                      letters: np.ndarray | None = None) -> None:
        """Commit one finished broadcast: vectors to pending/ (and letter posteriors to letters/),
        then one catalogue transaction. Files are named by the broadcast's new id, which no other
        broadcast ever has (a broadcast with no windows shares its first label with the next one)."""
        old = self.known(rel_path)
        label, bid = self.next_label(), self.next_id()
        rec = {}
        if letters is not None:
            data = _npy(letters.astype(np.uint8))
            atomic_write(self.root / "letters" / f"b{bid}.npy", data)
            rec["letters"] = (len(data), hashlib.sha256(data).hexdigest())
        data = _npy(vectors.astype(np.float32))
        atomic_write(self.root / "pending" / f"b{bid}.npy", data)
        rec["vectors"] = (len(data), hashlib.sha256(data).hexdigest())
        lb, ls = rec.get("letters", (None, None))
        with self.snapshot(exclusive=True):
            cur = self.db.cursor()
            cur.execute("begin immediate")
            try:
                if old is not None:  # changed content: the old windows are dropped
                    self._forget(cur, [old[0]])
                cur.execute("insert or replace into meta(key, value) values('next_label', ?)", (str(label + len(vectors)),))
                cur.execute("insert or replace into meta(key, value) values('next_id', ?)", (str(bid + 1),))
                cur.execute(
                    "insert into broadcasts(id, path, sha256, duration, speech_seconds, first_label, n_windows, starts, kinds,"
                    " indexed_at, in_graph, letters_bytes, letters_sha256, vectors_bytes, vectors_sha256)"
                    " values (?,?,?,?,?,?,?,?,?,?,0,?,?,?,?)",
                    (bid, rel_path, sha256, duration, speech_seconds, label, len(vectors), starts.astype(np.int32).tobytes(),
                     kinds.astype(np.uint8).tobytes(), now(), lb, ls, *rec["vectors"]))
                cur.execute("delete from failures where path=?", (rel_path,))
                cur.execute("commit")
            except BaseException:
                cur.execute("rollback")
                raise

    def _forget(self, cur, ids: list[int]) -> None:
        """Inside a transaction: drop broadcasts from the catalogue; their labels leave the graph
        (queued in meta 'dead_labels' until the next merge marks them deleted there)."""
        dead = self._dead_labels(cur)
        for bid in ids:
            row = cur.execute("select first_label, n_windows, in_graph from broadcasts where id=?", (bid,)).fetchone()
            if row and row[1] and row[2]:
                dead.append([int(row[0]), int(row[1])])
            cur.execute("delete from broadcasts where id=?", (bid,))
        cur.execute("insert or replace into meta(key, value) values('dead_labels', ?)", (json.dumps(dead),))

    @staticmethod
    def _dead_labels(cur) -> list:
        row = cur.execute("select value from meta where key='dead_labels'").fetchone()
        return json.loads(row[0]) if row else []

    def remove_broadcasts(self, ids: list[int]) -> None:
        """Take broadcasts out of the index (their files go at the next merge or clean-up)."""
        if not ids:
            return
        with self.snapshot(exclusive=True):
            cur = self.db.cursor()
            cur.execute("begin immediate")
            try:
                self._forget(cur, ids)
                cur.execute("commit")
            except BaseException:
                cur.execute("rollback")
                raise

    def rename_broadcast(self, bid: int, new_path: str) -> None:
        """A file moved or renamed with the same content keeps its windows under its new path."""
        with self.snapshot(exclusive=True):
            self.q("update broadcasts set path=? where id=?", (new_path, bid))

    def record_failure(self, rel_path: str, error: str) -> None:
        self.q("insert or replace into failures(path, error, at) values (?,?,?)", (rel_path, error, now()))

    def excluded(self) -> set[str]:
        """Paths taken out on request (`trawl remove`): later runs leave them out."""
        try:
            return {r[0] for r in self.db.execute("select path from excluded")}
        except sqlite3.OperationalError:  # a catalogue older than exclusions, opened read-only
            return set()

    def set_excluded(self, paths, excluded: bool = True) -> None:
        for p in paths:
            if excluded:
                self.q("insert or replace into excluded(path, at) values (?, ?)", (p, now()))
            else:
                self.q("delete from excluded where path=?", (p,))

    def failures(self) -> list[tuple[str, str]]:
        return [(r[0], r[1]) for r in self.q("select path, error from failures order by path")]

    def forget_failures(self, paths) -> None:
        for p in paths:
            self.q("delete from failures where path=?", (p,))

    COLUMNS = ["id", "path", "sha256", "duration", "speech_seconds", "first_label", "n_windows", "indexed_at", "in_graph"]

    def broadcasts(self) -> list[dict]:
        """Catalogue rows, in label order (a broadcast with no windows before the one sharing its first label)."""
        have = {r[1] for r in self.q("pragma table_info(broadcasts)")}
        cols = self.COLUMNS + [c for c in ADDED_COLUMNS if c in have]
        rows = self.q(f"select {', '.join(cols)} from broadcasts order by first_label, n_windows, id")
        return [dict(zip(cols, r)) for r in rows]

    def total_seconds(self) -> float:
        return float(self.q("select coalesce(sum(duration), 0) from broadcasts")[0][0])

    def shard_records(self, which: str = "shard") -> dict[int, dict]:
        """Shard number -> {bytes, sha256, count} recorded when it was last written (none for older
        indexes); which="shard_next": the records of a merge that was killed before its commit."""
        rows = self.q(f"select key, value from meta where key like '{which}:%'")
        return {int(k.split(":")[1]): json.loads(v) for k, v in rows}

    # --------------------------------------------------------------- graph
    def load_graph(self, merge_pending: bool = True, skip_shards: frozenset = frozenset(),
                   rows: list[dict] | None = None) -> ShardedGraph:
        """The HNSW graph with every committed broadcast in it (pending ones added in memory);
        `skip_shards` (damaged ones) stand as empty shards."""
        if self._graph is not None:
            return self._graph
        h = self.manifest["hnsw"]
        rec = self.shard_records()
        # an index made before shards has one graph of any size: it stays one shard
        g = ShardedGraph.load(self.root, self.dim, h["M"], h["ef_construction"],
                              int(h.get("shard_capacity", UNSHARDED)), self.next_label(),
                              count=(max(rec) + 1) if rec else None, skip=frozenset(skip_shards))
        rows = self.broadcasts() if rows is None else rows
        if merge_pending:
            self._add_pending(g, rows)
        live = [np.arange(b["first_label"], b["first_label"] + b["n_windows"]) for b in rows if b["n_windows"]]
        g.alive = np.sort(np.concatenate(live)) if live else np.zeros(0, np.int64)
        self._graph = g
        return g

    def _add_pending(self, g: ShardedGraph, rows: list[dict], skip: set | None = None) -> list[int]:
        added = []
        for b in rows:
            if b["in_graph"] or (skip and b["id"] in skip):
                continue
            if b["n_windows"]:
                vec = np.load(self.pending_path(b))
                g.add_items(vec, np.arange(b["first_label"], b["first_label"] + len(vec)), num_threads=2)
            added.append(b["id"])
        return added

    def merge(self) -> int:
        """Merge pending vectors into the graph's shards (each file replaced atomically), take
        removed broadcasts' labels out of it, and clear their files. Returns windows merged. A run
        killed between two shard files re-adds the same labels next time, which hnswlib treats as updates."""
        g = self.load_graph(merge_pending=False)
        before = g.get_current_count()
        dead = self._dead_labels(self.db)
        added = self._add_pending(g, self.broadcasts())
        if not added and not dead:
            return 0
        for first, n in dead:
            g.remove(np.arange(first, first + n))
        with self.snapshot(exclusive=True):  # readers wait for the whole merge, then see its result
            records = {}
            for k in sorted(g.changed):
                def write(tmp: str, k: int = k) -> None:
                    g.shards[k].save_index(tmp)
                    # recorded before the file is replaced: a run killed after the replace leaves a file
                    # that matches this record, not a damaged one (integrity.verify accepts either)
                    records[k] = {"bytes": os.path.getsize(tmp), "sha256": sha256_file(Path(tmp)),
                                  "count": g.shards[k].get_current_count()}
                    self.q("insert or replace into meta(key, value) values(?, ?)", (f"shard_next:{k}", json.dumps(records[k])))

                atomic_write_with(self.root / shard_name(k), write)
            g.changed.clear()
            self._commit_merge(records, added)
        return g.get_current_count() - before

    def _commit_merge(self, records: dict, added: list[int]) -> None:
        """One transaction: the shards' records, the merged broadcasts marked, removed labels cleared;
        then the files nothing refers to any more go."""
        cur = self.db.cursor()
        cur.execute("begin immediate")
        try:
            for k, r in records.items():
                cur.execute("insert or replace into meta(key, value) values(?, ?)", (f"shard:{k}", json.dumps(r)))
            cur.execute("delete from meta where key like 'shard_next:%'")
            if added:
                cur.execute(f"update broadcasts set in_graph=1 where id in ({','.join(map(str, added))})")
            cur.execute("delete from meta where key='dead_labels'")
            cur.execute("commit")
        except BaseException:
            cur.execute("rollback")
            raise
        self._drop_stale_files()

    def _drop_stale_files(self) -> None:
        """Delete pending and letter files no committed broadcast refers to (a killed run's, a
        removed or re-indexed broadcast's). Called inside snapshot(exclusive=True) or by a writer before readers."""
        rows = self.broadcasts()
        keep_pending = {self.pending_path(b).name for b in rows if not b["in_graph"]}
        keep_letters = {self.letters_path(b).name for b in rows}
        for f in (self.root / "pending").glob("*.npy"):
            if f.name not in keep_pending:
                f.unlink(missing_ok=True)
        for f in (self.root / "letters").glob("*.npy"):
            if f.name not in keep_letters:
                f.unlink(missing_ok=True)

    def clean_orphans(self) -> None:
        """Remove files of broadcasts whose commit never happened (a killed run) and temporary files."""
        with self.snapshot(exclusive=True):
            self._drop_stale_files()
        for folder in (self.root, self.root / "pending", self.root / "letters"):
            for f in folder.glob(".*.tmp"):
                f.unlink(missing_ok=True)

    # --------------------------------------------------------------- lookups
    def window_table(self, rows: list[dict] | None = None):
        """Arrays for label -> (broadcast, start, end): sorted first labels and per-broadcast spans."""
        rows = self.broadcasts() if rows is None else rows
        blobs = dict((r[0], (r[1], r[2])) for r in self.q("select id, starts, kinds from broadcasts"))
        firsts = np.array([b["first_label"] for b in rows], np.int64)
        counts = np.array([b["n_windows"] for b in rows], np.int64)
        spans = [(np.frombuffer(blobs[b["id"]][0], np.int32), np.frombuffer(blobs[b["id"]][1], np.uint8)) for b in rows]
        return [b["path"] for b in rows], firsts, counts, spans

    def letters(self, b: dict) -> np.ndarray | None:
        """The stored letter posteriors (uint8, memory-mapped) of a broadcast (a catalogue row)."""
        p = self.letters_path(b)
        return np.load(p, mmap_mode="r") if p.exists() else None

    def vectors(self, labels: np.ndarray) -> np.ndarray:
        g = self.load_graph()
        return np.asarray(g.get_items(np.asarray(labels, np.int64)), dtype=np.float32).reshape(-1, self.dim)

    # --------------------------------------------------------------- settings files
    SETTINGS = ("calibration.json", "rules.txt", "query_map.json", "learned_rules.json")
    # what carries over to an index of the same archive made with another model: the textual rules;
    # a calibration and a query map describe the old model's scores and vectors, so they are refitted
    PORTABLE_SETTINGS = ("rules.txt", "learned_rules.json")

    @contextmanager
    def settings_change(self, wait: bool = False):
        """A change of the query-side settings that is all or nothing: under the settings lock, and
        if the block raises (a refused sample), every settings file is put back as it was."""
        with self.lock("settings", wait):
            before = {n: (self.root / n).read_bytes() if (self.root / n).exists() else None for n in self.SETTINGS}
            try:
                yield self
            except BaseException:
                for n, data in before.items():
                    if data is None:
                        (self.root / n).unlink(missing_ok=True)
                    elif not (self.root / n).exists() or (self.root / n).read_bytes() != data:
                        atomic_write(self.root / n, data)
                raise

    def read_setting(self, name: str) -> dict | None:
        p = self.root / name
        if not p.exists():
            return None
        try:
            return json.loads(p.read_text(encoding="utf-8"))
        except (json.JSONDecodeError, UnicodeDecodeError) as e:
            raise IndexDamaged(f"{p} is damaged ({e}); run the command that made it again "
                               f"(trawl calibrate, trawl adapt) or delete the file") from None

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


def shard_name(k: int) -> str:
    from .graph import shard_file

    return shard_file(k)
