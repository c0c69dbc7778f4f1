"""Checking an index's files against what the catalogue recorded when they were written, and
mending what is damaged.

Every graph shard, pending-vector file and letters file has its size and SHA-256 recorded in the
catalogue at write time. `verify` compares them (sizes only, when `hashes` is false: what a search
does on opening, cheaply) and says which broadcasts each damaged file holds; `repair` (run by
`trawl index` under the writer lock) takes those broadcasts out of the catalogue, so that the same
run embeds them again from their audio, and only them. A damaged catalogue cannot say what the
other files hold: it is set aside (catalog.sqlite.damaged) and the whole archive is indexed again.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import IndexDamaged
from .graph import shard_file
from .index_store import UNSHARDED, Index, sha256_file


@dataclass
class Damage:
    file: str  # relative to the index folder
    what: str  # missing, truncated, changed, unreadable
    ids: list[int] = field(default_factory=list)  # catalogue ids of the broadcasts it holds
    paths: list[str] = field(default_factory=list)
    shard: int | None = None

    def line(self) -> str:
        held = f"; holds {len(self.paths)} broadcast(s): {', '.join(self.paths[:3])}{' ...' if len(self.paths) > 3 else ''}" if self.paths else ""
        return f"{self.file}: {self.what}{held}"


def _file_state(path: Path, size: int | None, sha: str | None, hashes: bool) -> str | None:
    """None when the file matches its record, else what is wrong with it."""
    if not path.exists():
        return "missing"
    if size is not None and path.stat().st_size != size:
        return f"truncated or changed ({path.stat().st_size} bytes, {size} when written)"
    if hashes and sha is not None and sha256_file(path) != sha:
        return "changed since it was written (SHA-256 differs)"
    if size is None and path.suffix == ".npy":  # an index made before sizes were recorded: can it be read?
        try:
            np.load(path, mmap_mode="r")
        except Exception as e:  # noqa: BLE001 - numpy's messages for a truncated file vary
            return f"unreadable ({str(e).splitlines()[0][:60]})"
    return None


def check_catalogue(idx: Index) -> Damage | None:
    try:
        res = idx.q("pragma quick_check")
        bad = [r[0] for r in res if r[0] != "ok"]
        idx.broadcasts()
    except IndexDamaged as e:
        return Damage("catalog.sqlite", f"damaged ({e})")
    return Damage("catalog.sqlite", f"damaged ({bad[0]})") if bad else None


def verify(idx: Index, hashes: bool = True, rows: list[dict] | None = None) -> list[Damage]:
    """Every damaged or missing index file, with the broadcasts it holds."""
    cat = check_catalogue(idx) if hashes else None
    if cat is not None:
        return [cat]
    rows = idx.broadcasts() if rows is None else rows
    out: list[Damage] = []
    cap = int(idx.manifest["hnsw"].get("shard_capacity", UNSHARDED))
    unfinished = idx.shard_records("shard_next")
    for k, rec in sorted(idx.shard_records().items()):
        state = _file_state(idx.root / shard_file(k), rec.get("bytes"), rec.get("sha256"), hashes)
        if state and k in unfinished:  # a merge killed after replacing the file: its own record says
            nxt = unfinished[k]
            state = _file_state(idx.root / shard_file(k), nxt.get("bytes"), nxt.get("sha256"), hashes)
        if state:
            held = [b for b in rows if b["in_graph"] and b["n_windows"]
                    and b["first_label"] // cap <= k <= (b["first_label"] + b["n_windows"] - 1) // cap]
            out.append(Damage(shard_file(k), state, [b["id"] for b in held], [b["path"] for b in held], shard=k))
    with_letters = bool(idx.manifest.get("letters"))
    for b in rows:
        if not b["n_windows"] and not b.get("letters_bytes"):  # nothing stored for it (an older index)
            continue
        if with_letters:
            p = idx.letters_path(b)
            state = _file_state(p, b.get("letters_bytes"), b.get("letters_sha256"), hashes)
            if state:
                out.append(Damage(f"letters/{p.name}", state, [b["id"]], [b["path"]]))
        if not b["in_graph"] and b["n_windows"]:
            p = idx.pending_path(b)
            state = _file_state(p, b.get("vectors_bytes"), b.get("vectors_sha256"), hashes)
            if state:
                out.append(Damage(f"pending/{p.name}", state, [b["id"]], [b["path"]]))
    return out


def reset_catalogue(root: Path) -> None:
    """A damaged catalogue: keep it aside as catalog.sqlite.damaged and clear the files it described
    (graph, pending vectors, letters); the settings (calibration, rules, adaptation) stay."""
    root = Path(root)
    cat = root / "catalog.sqlite"
    if cat.exists():
        cat.replace(root / "catalog.sqlite.damaged")
    for f in list(root.glob("graph*.hnsw")) + list((root / "pending").glob("*.npy")) + list((root / "letters").glob("*.npy")):
        f.unlink(missing_ok=True)
    for extra in ("catalog.sqlite-journal", "catalog.sqlite-wal", "catalog.sqlite-shm"):
        (root / extra).unlink(missing_ok=True)


def repair(idx: Index, damage: list[Damage]) -> None:
    """Take the broadcasts held by damaged files out of the catalogue (the same run embeds them
    again); a damaged shard is dropped whole and its broadcasts re-embedded. Not for a damaged
    catalogue (see reset_catalogue)."""
    ids = sorted({i for d in damage for i in d.ids})
    with idx.snapshot(exclusive=True):
        for d in damage:
            if d.shard is not None:
                (idx.root / d.file).unlink(missing_ok=True)
                idx.q("delete from meta where key=?", (f"shard:{d.shard}",))
        idx._graph = None
    idx.remove_broadcasts(ids)
    with idx.snapshot(exclusive=True):
        idx._drop_stale_files()
