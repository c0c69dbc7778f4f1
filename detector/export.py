"""Hit lists for programs and spreadsheets: CSV (RFC 4180) and JSON.

Columns, in order: ``term, broadcast, start, end, start_hms, end_hms, score,
confidence, rank``, then ``accepted`` (yes/no) when a calibration exists, then
``verdict`` (always, empty: the archivist fills it in), then the keys of
``Hit.extra`` (sorted, union over all hits).

Text cells (term, broadcast, extra text) that a spreadsheet would read as a
formula get a leading single quote, following the OWASP "CSV Injection"
guidance; numeric cells are never changed. ``unguard`` undoes it, exactly.
"""

from __future__ import annotations

import csv
import json
import math
import os
import tempfile
from numbers import Integral, Real
from pathlib import Path
from typing import Any, Iterable, TextIO

from . import TrawlError

BASE_COLUMNS = (
    "term",
    "broadcast",
    "start",
    "end",
    "start_hms",
    "end_hms",
    "score",
    "confidence",
    "rank",
)

# First characters that make a spreadsheet evaluate a cell (OWASP CSV Injection).
FORMULA_TRIGGERS = ("=", "+", "-", "@", "\t", "\r")
GUARD = "'"


def _needs_guard(cell: str) -> bool:
    # Quotes already in front of a trigger are guarded too, so that unguard()
    # can tell the guard from a quote that was part of the text.
    rest = cell.lstrip(GUARD)
    return rest[:1] != "" and rest[0] in FORMULA_TRIGGERS


def guard(cell: str) -> str:
    """The text cell, with a leading ``'`` when a spreadsheet would run it."""
    return GUARD + cell if _needs_guard(cell) else cell


def unguard(cell: str) -> str:
    """Undo ``guard``: ``unguard(guard(x)) == x`` for every string x."""
    if cell.startswith(GUARD) and _needs_guard(cell[1:]):
        return cell[1:]
    return cell


def format_hms(seconds: float) -> str:
    """``HH:MM:SS.mmm``, rounded to the millisecond like the 3-decimal
    ``start``/``end`` cells; hours take more digits past 99."""
    if not math.isfinite(seconds) or seconds < 0:
        raise TrawlError(f"cannot write {seconds} as a time of day")
    millis = int(f"{seconds:.3f}".replace(".", ""))
    hours, millis = divmod(millis, 3_600_000)
    minutes, millis = divmod(millis, 60_000)
    secs, millis = divmod(millis, 1000)
    return f"{hours:02d}:{minutes:02d}:{secs:02d}.{millis:03d}"


def columns(hits: Iterable[Any], calibrated: bool) -> list[str]:
    """The header row for these hits."""
    names = list(BASE_COLUMNS)
    if calibrated:
        names.append("accepted")
    names.append("verdict")
    extra = sorted({k for h in hits for k in h.extra})
    clash = [k for k in extra if k in names]
    if clash:
        raise TrawlError(f"extra column(s) {', '.join(clash)} would repeat a standard column")
    return names + extra


def _yes_no(value: bool | None) -> str:
    return "" if value is None else ("yes" if value else "no")


def _extra_cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return _yes_no(value)
    if isinstance(value, Real):
        return _plain_number(value)
    return guard(str(value))


def _plain_number(value: Real) -> str:
    # repr of a float is its shortest round-trip form; numpy scalars become plain
    return str(int(value)) if isinstance(value, Integral) else repr(float(value))


def _row(hit: Any, names: list[str], calibrated: bool) -> list[str]:
    cells = {
        "term": guard(hit.term),
        "broadcast": guard(hit.broadcast),
        "start": f"{hit.start:.3f}",
        "end": f"{hit.end:.3f}",
        "start_hms": format_hms(hit.start),
        "end_hms": format_hms(hit.end),
        "score": f"{hit.score:.4f}",
        "confidence": f"{hit.confidence:.4f}",
        "rank": str(int(hit.rank)),
        "verdict": "",
    }
    if calibrated:
        cells["accepted"] = _yes_no(hit.accepted)
    return [cells[n] if n in cells else _extra_cell(hit.extra.get(n)) for n in names]


def _write(hits: list[Any], out: TextIO, calibrated: bool) -> None:
    names = columns(hits, calibrated)
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180: CRLF
    writer.writerow(names)
    for hit in hits:
        writer.writerow(_row(hit, names, calibrated))


def write_csv(hits: Iterable[Any], path_or_file: str | os.PathLike | TextIO, calibrated: bool) -> None:
    """Write hits as RFC 4180 CSV (UTF-8, CRLF, header row).

    Given a path, the file is replaced atomically: written to a temporary file
    in the same folder, then renamed over the target, so a reader never sees
    half a file and a failure leaves any old file as it was. Given an open
    text file (opened with ``newline=""``), it is written to directly.
    """
    hits = list(hits)
    if not isinstance(path_or_file, (str, os.PathLike)):
        _write(hits, path_or_file, calibrated)
        return
    target = Path(path_or_file)
    folder = target.parent
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="") as out:
            _write(hits, out, calibrated)
            out.flush()
            os.fsync(out.fileno())
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the usual mode
        os.replace(tmp, target)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise


def _number(value: float, decimals: int) -> float | None:
    return round(float(value), decimals) if math.isfinite(value) else None


def hit_record(hit: Any, calibrated: bool) -> dict[str, Any]:
    """One hit as a dict of the CSV's fields, numbers as numbers, no guard."""
    record: dict[str, Any] = {
        "term": hit.term,
        "broadcast": hit.broadcast,
        "start": _number(hit.start, 3),
        "end": _number(hit.end, 3),
        "start_hms": format_hms(hit.start),
        "end_hms": format_hms(hit.end),
        "score": _number(hit.score, 4),
        "confidence": _number(hit.confidence, 4),
        "rank": int(hit.rank),
    }
    if calibrated:
        record["accepted"] = None if hit.accepted is None else bool(hit.accepted)
    record["verdict"] = ""
    return record


def hits_to_json(hits: Iterable[Any], calibrated: bool) -> str:
    """The CSV's fields as a JSON array of objects (UTF-8 text kept as is).

    Numbers are numbers (non-finite ones become null), ``accepted`` is a
    boolean, ``verdict`` is "", and extra fields follow in sorted order.
    """
    hits = list(hits)
    names = columns(hits, calibrated)
    records = []
    for hit in hits:
        record = hit_record(hit, calibrated)
        for name in names[len(record) :]:
            value = hit.extra.get(name)
            if isinstance(value, Real) and not isinstance(value, bool):
                value = int(value) if isinstance(value, Integral) else float(value)
                if isinstance(value, float) and not math.isfinite(value):
                    value = None
            record[name] = value
        records.append(record)
    return json.dumps(records, ensure_ascii=False, indent=2, allow_nan=False, default=str)
