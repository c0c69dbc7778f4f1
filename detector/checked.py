"""Reading a checked sample: hits whose ``verdict`` the archivist filled in.

Any CSV with at least the columns ``term, broadcast, start, end, verdict``
will do; a search CSV is one. Spreadsheets save such files in several ways,
all accepted: UTF-8 with or without a byte-order mark, separated by commas,
semicolons or tabs (decided from the header line: the separator that makes
it hold all the required columns), and with any line ending.
"""

from __future__ import annotations

import csv
import hashlib
import io
import math
import unicodedata
from dataclasses import dataclass
from pathlib import Path

from . import TrawlError
from .export import unguard

REQUIRED_COLUMNS = ("term", "broadcast", "start", "end", "verdict")
_SEPARATORS = (",", ";", "\t")
_VERDICTS = {
    "yes": True, "y": True, "1": True, "true": True,
    "no": False, "n": False, "0": False, "false": False,
}


@dataclass(frozen=True)
class CheckedRow:
    term: str  # NFC, guard removed
    broadcast: str  # guard removed
    start: float
    end: float
    verdict: bool | None  # None: not checked yet
    line: int  # line of the file where the row starts (the header is line 1)


def parse_verdict(cell: str) -> bool | None:
    """True/False for yes/no, y/n, 1/0, true/false (any case); None if blank.

    A ValueError for anything else.
    """
    text = cell.strip().lower()
    if not text:
        return None
    if text not in _VERDICTS:
        raise ValueError(cell)
    return _VERDICTS[text]


def _header(line: str, separator: str) -> list[str]:
    row = next(csv.reader([line], delimiter=separator), [])
    return [name.strip().lower() for name in row]


def _separator(first_line: str) -> str:
    """The separator under which the header holds every required column.

    When several qualify (a header cannot hold all five names under two
    separators unless a name contains the other separator) the one splitting
    it into the most columns wins; when none does, the comma (so that the
    error lists what is missing from a comma-separated reading).
    """
    fits = [
        (len(_header(first_line, s)), s)
        for s in _SEPARATORS
        if all(c in _header(first_line, s) for c in REQUIRED_COLUMNS)
    ]
    return max(fits)[1] if fits else ","


def _number(cell: str, separator: str) -> float:
    text = cell.strip()
    if separator == ";" and text.count(",") == 1 and "." not in text:
        text = text.replace(",", ".")  # decimal comma, as ;-separated spreadsheets write
    value = float(text)
    if not math.isfinite(value) or value < 0:
        raise ValueError(cell)
    return value


def read_checked(path: str | Path) -> list[CheckedRow]:
    """The rows of a checked sample, in file order; blank lines are skipped.

    TrawlError (naming the file and line) for: missing columns, a bad number
    in start/end, end before start, an unknown verdict, a non-UTF-8 file.
    """
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise TrawlError(f"cannot read the checked sample {path}: {exc.strerror}") from exc
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise TrawlError(
            f"the checked sample {path} is not UTF-8 (byte {exc.start}); save it as 'CSV UTF-8'"
        ) from exc
    if not text.strip():
        raise TrawlError(f"the checked sample {path} is empty")
    first_line = io.StringIO(text, newline=None).readline()
    separator = _separator(first_line)
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=separator)
    header = [name.strip().lower() for name in next(reader)]
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        raise TrawlError(
            f"the checked sample {path} lacks the column(s) {', '.join(missing)} in its header line"
        )
    col = {c: header.index(c) for c in REQUIRED_COLUMNS}
    needed = max(col.values()) + 1
    rows: list[CheckedRow] = []
    next_line = reader.line_num + 1
    for row in reader:
        line, next_line = next_line, reader.line_num + 1
        if not any(cell.strip() for cell in row):
            continue
        where = f"{path}, line {line}"
        if len(row) < needed:
            row = row + [""] * (needed - len(row))  # trailing empty cells dropped by some editors
        term = unicodedata.normalize("NFC", unguard(row[col["term"]].strip()))
        broadcast = unguard(row[col["broadcast"]].strip())
        if not term or not broadcast:
            raise TrawlError(f"{where}: the term or the broadcast is empty")
        times = []
        for name in ("start", "end"):
            cell = row[col[name]]
            try:
                times.append(_number(cell, separator))
            except ValueError:
                raise TrawlError(f"{where}: {name} {cell!r} is not a time in seconds") from None
        if times[1] < times[0]:
            raise TrawlError(f"{where}: end {times[1]} is before start {times[0]}")
        cell = row[col["verdict"]]
        try:
            verdict = parse_verdict(cell)
        except ValueError:
            raise TrawlError(
                f"{where}: verdict {cell!r} is not one of yes/no, y/n, 1/0, true/false (or blank)"
            ) from None
        rows.append(CheckedRow(term, broadcast, times[0], times[1], verdict, line))
    return rows


def sample_hash(path: str | Path) -> str:
    """SHA-256 of the file's bytes, in hex: names the sample a calibration came from."""
    digest = hashlib.sha256()
    try:
        with open(path, "rb") as f:
            for block in iter(lambda: f.read(1 << 16), b""):
                digest.update(block)
    except OSError as exc:
        raise TrawlError(f"cannot read {path}: {exc.strerror}") from exc
    return digest.hexdigest()
