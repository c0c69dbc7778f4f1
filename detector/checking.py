"""Checking hits by ear: the sample file being marked, and the audio of each hit.

``CheckFile`` holds a hit-list CSV (a search's ``--csv``, or a ``--suggest``
sample) and writes one verdict (or note) at a time back into it, atomically
(temporary file, then ``os.replace``). Only the cell that changed is
re-written: every other row is written back byte for byte as it was read
(quoting, formula guard, separator, line endings, a byte-order mark), so the
file stays what it was, a valid checked sample. Before every write the file on
disk is compared with what was last read or written; a file changed by someone
else is never overwritten (``FileChanged``).

``hit_audio`` decodes a hit with context from the original recording (opened
read-only); ``spectrogram_png`` draws it with the hit's span marked.
"""

from __future__ import annotations

import csv
import hashlib
import io
import os
import struct
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from . import TrawlError
from .checked import CheckedRow, _separator, parse_verdict, read_checked
from .export import guard, unguard

NOTE_COLUMN = "note"  # added (last) the first time a note is written
CONTEXT_SECONDS = 1.5  # audio played before and after a hit
MAX_NOTE = 500  # characters


class FileChanged(TrawlError):
    """The sample file on disk is not the one the page shows: someone else changed it."""


@dataclass
class Hit:
    number: int  # 0-based position among the sample's hits (blank lines are not hits)
    row: CheckedRow
    verdict_cell: str  # as in the file (yes, y, 1, true...), guard removed
    note: str
    cells: dict  # header name -> cell as in the file (guard removed), for display


def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


class CheckFile:
    """A hit-list CSV being marked. Not thread-safe: callers serialise writes."""

    def __init__(self, path: str | Path):
        self.path = Path(path)
        self.load()

    # ------------------------------------------------------------ reading
    def load(self) -> None:
        """(Re-)read the file; TrawlError (one line, naming the line) when it is not a hit list."""
        self.rows = read_checked(self.path)  # validates columns, times and verdicts
        data = self.path.read_bytes()
        self.digest = _digest(data)
        text = data.decode("utf-8-sig")
        self.bom = data.startswith(b"\xef\xbb\xbf")
        lines = io.StringIO(text, newline="").readlines()
        self.separator = _separator(lines[0] if lines else "")
        reader = csv.reader(iter(lines), delimiter=self.separator)
        self.records: list[tuple[list[str], str]] = []  # (cells, raw text with its line ending)
        consumed = 0
        for cells in reader:
            raw = "".join(lines[consumed:reader.line_num])
            consumed = reader.line_num
            self.records.append((cells, raw))
        self.header = [c.strip().lower() for c in self.records[0][0]]
        self.hit_records = [i for i, (cells, _) in enumerate(self.records)
                            if i > 0 and any(c.strip() for c in cells)]
        if len(self.hit_records) != len(self.rows):  # read_checked and this reading must agree
            raise TrawlError(f"{self.path}: cannot match its rows to hits; save it again as plain CSV")
        if not self.rows:
            raise TrawlError(f"{self.path} holds no hits to check")

    def _cell(self, cells: list[str], name: str) -> str:
        i = self.header.index(name) if name in self.header else -1
        return unguard(cells[i].strip()) if 0 <= i < len(cells) else ""

    def hits(self) -> list[Hit]:
        out = []
        for n, (row, r) in enumerate(zip(self.rows, self.hit_records)):
            cells = self.records[r][0]
            shown = {name: self._cell(cells, name) for name in self.header}
            out.append(Hit(n, row, self._cell(cells, "verdict"), self._cell(cells, NOTE_COLUMN), shown))
        return out

    def verdicts(self) -> list[bool | None]:
        return [row.verdict for row in self.rows]

    def changed_outside(self) -> bool:
        try:
            return _digest(self.path.read_bytes()) != self.digest
        except OSError:
            return True

    # ------------------------------------------------------------ writing
    def set(self, number: int, verdict: bool | None | str = "keep", note: str | None = None) -> None:
        """Write one hit's verdict (True/False/None = blank) and/or note, atomically.

        ``verdict="keep"`` leaves the verdict as it is. FileChanged, and nothing
        written, when the file on disk differs from the last one read or written.
        """
        if not 0 <= number < len(self.rows):
            raise IndexError(number)
        if self.changed_outside():
            raise FileChanged(f"{self.path} was changed by another program; reload it before marking more")
        header_cells, header_raw = self.records[0]
        add_note = note is not None and NOTE_COLUMN not in self.header
        records = list(self.records)
        if add_note:  # a new last column: an empty cell at the end of every other row
            records = [(cells + [""], _append_cell(raw, self.separator)) if i == 0 or i in self.hit_records
                       else (cells, raw) for i, (cells, raw) in enumerate(records)]
            records[0] = (header_cells + [NOTE_COLUMN], _append_cell(header_raw, self.separator, NOTE_COLUMN))
            header = self.header + [NOTE_COLUMN]
        else:
            header = self.header
        r = self.hit_records[number]
        cells, raw = records[r]
        cells = cells + [""] * (len(header) - len(cells))
        if verdict != "keep":
            cells[header.index("verdict")] = "" if verdict is None else ("yes" if verdict else "no")
        if note is not None:
            cells[header.index(NOTE_COLUMN)] = guard(note)  # free text: guarded like any text cell
        records[r] = (cells, _format_row(cells, self.separator, _ending(raw)))
        text = "".join(raw for _, raw in records)
        data = (b"\xef\xbb\xbf" if self.bom else b"") + text.encode("utf-8")
        _atomic_replace(self.path, data)
        self.records, self.header, self.digest = records, header, _digest(data)
        row = self.rows[number]
        if verdict != "keep":
            self.rows[number] = CheckedRow(row.term, row.broadcast, row.start, row.end, verdict, row.line)


def _ending(raw: str) -> str:
    for end in ("\r\n", "\n", "\r"):
        if raw.endswith(end):
            return end
    return ""  # the last line of a file without a final newline


def _append_cell(raw: str, separator: str, value: str = "") -> str:
    end = _ending(raw)
    body = raw[: len(raw) - len(end)]
    return body + separator + (_format_row([value], separator, "") if value else "") + end


def _format_row(cells: list[str], separator: str, ending: str) -> str:
    buf = io.StringIO()
    csv.writer(buf, delimiter=separator, lineterminator=ending).writerow(cells)
    return buf.getvalue()


def _atomic_replace(path: Path, data: bytes) -> None:
    """Temporary file beside `path`, then os.replace; the file keeps its permissions."""
    from .index_store import atomic_write_with

    mode = path.stat().st_mode & 0o777

    def write(tmp: str) -> None:
        with open(tmp, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.chmod(tmp, mode)

    atomic_write_with(path, write)


def parse_note(value) -> str:
    """A note as posted: text of at most MAX_NOTE characters, on one line. ValueError otherwise."""
    if not isinstance(value, str):
        raise ValueError("the note must be text")
    if len(value) > MAX_NOTE:
        raise ValueError(f"the note is longer than {MAX_NOTE} characters")
    if any(ch in value for ch in "\r\n\x00"):
        raise ValueError("the note must be one line")
    return value.strip()


def parse_posted_verdict(value) -> bool | None:
    """'yes' / 'no' / '' (not checked) as posted by the page; ValueError otherwise."""
    if value not in ("yes", "no", ""):
        raise ValueError("the verdict must be yes, no or empty")
    return parse_verdict(value)


# ---------------------------------------------------------------- audio
def hit_audio(path: Path, start: float, end: float, context: float = CONTEXT_SECONDS) -> tuple[np.ndarray, int, float]:
    """(mono float32 samples, sample rate, clip start in seconds) of start-context .. end+context.

    The recording is opened read-only (libsndfile, mode 'r') and only that stretch is decoded.
    """
    import soundfile as sf

    try:
        with sf.SoundFile(str(path), mode="r") as f:
            sr = f.samplerate
            a = max(0, int((start - context) * sr))
            b = min(f.frames, int(np.ceil((end + context) * sr)))
            if b <= a:
                raise TrawlError(f"the hit at {start:.3f} s lies past the end of {path.name}")
            f.seek(a)
            x = f.read(b - a, dtype="float32", always_2d=True)
    except TrawlError:
        raise
    except Exception as e:
        raise TrawlError(f"cannot read {path.name} ({str(e).splitlines()[0][:100] if str(e) else type(e).__name__})") from None
    return x.mean(axis=1).astype(np.float32), sr, a / sr


def wav_bytes(x: np.ndarray, sr: int) -> bytes:
    import soundfile as sf

    buf = io.BytesIO()
    sf.write(buf, x, sr, format="WAV", subtype="PCM_16")
    return buf.getvalue()


PICTURE_HEIGHT = 160
PICTURE_COLUMNS_PER_SECOND = 100  # one column per 10 ms
MARK = (255, 214, 10)  # the span's edges and its band along the top


def spectrogram_image(x: np.ndarray, sr: int, span: tuple[float, float]) -> np.ndarray:
    """An RGB picture (height, width, 3) uint8: log-mel spectrogram, low frequencies at the
    bottom, the span (seconds from the clip start) marked by yellow edges and a band on top."""
    import librosa

    hop = max(1, sr // PICTURE_COLUMNS_PER_SECOND)
    n_fft = 1 << int(np.ceil(np.log2(max(hop * 2.5, 256))))
    mel = librosa.feature.melspectrogram(y=x, sr=sr, n_fft=n_fft, hop_length=hop, n_mels=80, fmax=min(8000, sr / 2))
    db = librosa.power_to_db(mel, ref=np.max(mel) if mel.size and mel.max() > 0 else 1.0, top_db=70)
    v = np.clip((db + 70) / 70, 0, 1)[::-1]  # high frequencies at the top
    rows = np.linspace(0, v.shape[0] - 1, PICTURE_HEIGHT).round().astype(int)
    v = v[rows]
    # a dark blue -> teal -> pale ramp (pure numpy: no colour map library)
    ramp = np.array([[12, 18, 40], [20, 90, 120], [80, 180, 160], [235, 245, 220]], float)
    pos = v * (len(ramp) - 1)
    lo = np.floor(pos).astype(int).clip(0, len(ramp) - 2)
    frac = (pos - lo)[..., None]
    img = (ramp[lo] * (1 - frac) + ramp[lo + 1] * frac).astype(np.uint8)
    width = img.shape[1]
    cols = [int(round(t * sr / hop)) for t in span]
    a, b = (min(max(c, 0), width - 1) for c in cols)
    img[:6, a:b + 1] = MARK
    img[:, a] = MARK
    img[:, b] = MARK
    return img


def png_bytes(img: np.ndarray) -> bytes:
    """An 8-bit RGB PNG (W3C PNG specification: signature, IHDR, one IDAT, IEND; filter 0 per row)."""
    h, w, _ = img.shape

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body) & 0xFFFFFFFF)

    raw = b"".join(b"\x00" + img[y].tobytes() for y in range(h))
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))


def searched_form(index, term: str) -> str:
    """The term as search spells it for the model: normalised, then the index's rules and any
    learned rules that are switched on (as ``Searcher.spelling_vector`` does)."""
    from .rule_learning import LEARNED_RULES_FILE, LearnedRules
    from .rules import parse_rules
    from .spelling import check_term

    try:
        t = check_term(term)
    except TrawlError:
        return term
    text = index.read_text("rules.txt")
    if text:
        t = parse_rules(text, "rules stored in the index").apply(t)
    lr = index.read_setting(LEARNED_RULES_FILE)
    if lr:
        learned = LearnedRules.from_dict(lr)
        if learned.enabled:
            t = learned.ruleset().apply_or_keep(t)
    return t
