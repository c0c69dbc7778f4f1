"""Reading checked samples: verdicts, guards, separators, errors."""

from __future__ import annotations

import csv
import hashlib

import pytest

from detector import TrawlError
from detector.checked import CheckedRow, parse_verdict, read_checked, sample_hash
from detector.export import write_csv
from detector.hits import Hit


def write_rows(path, rows, delimiter=",", bom=False):
    with open(path, "w", encoding="utf-8-sig" if bom else "utf-8", newline="") as f:
        csv.writer(f, delimiter=delimiter).writerows(rows)


HEADER = ["term", "broadcast", "start", "end", "verdict"]


@pytest.mark.parametrize(
    "cell, expected",
    [("yes", True), ("YES", True), ("Y", True), ("1", True), ("True", True), (" yes ", True),
     ("no", False), ("No", False), ("n", False), ("0", False), ("FALSE", False),
     ("", None), ("   ", None)],
)
def test_verdict_values(cell, expected):
    # CONTRACTS.md: yes/no case-insensitive, y/n, 1/0, true/false; blank = unchecked.
    assert parse_verdict(cell) is expected


def test_search_csv_with_verdicts_is_a_checked_sample(tmp_path):
    # Written by the exporter (guarded cells, calibrated columns), then filled
    # in the way a spreadsheet would: with the stdlib csv module.
    terms = ["=SUM(A1)", "-x", "ሰላም", "bɔ̀ɔ́"]
    hits = [Hit(term=t, broadcast=f"@news/{i}.wav", start=1.5 * i, end=1.5 * i + 0.75,
                score=0.5, confidence=0.5, rank=1, accepted=True) for i, t in enumerate(terms)]
    path = tmp_path / "sample.csv"
    write_csv(hits, path, calibrated=True)
    with open(path, encoding="utf-8", newline="") as f:
        rows = list(csv.reader(f))
    v = rows[0].index("verdict")
    for row, verdict in zip(rows[1:], ["yes", "N", "", "1"]):
        row[v] = verdict
    write_rows(path, rows)
    got = read_checked(path)
    assert [r.term for r in got] == terms  # guard removed
    assert [r.broadcast for r in got] == [f"@news/{i}.wav" for i in range(4)]
    assert [r.verdict for r in got] == [True, False, None, True]
    assert [r.start for r in got] == [0.0, 1.5, 3.0, 4.5]
    assert [r.line for r in got] == [2, 3, 4, 5]


def test_bad_verdict_names_the_row(tmp_path):
    path = tmp_path / "sample.csv"
    write_rows(path, [HEADER, ["alpha", "a.wav", "1.0", "1.5", "yes"],
                      ["beta", "a.wav", "2.0", "2.5", "maybe"]])
    with pytest.raises(TrawlError) as err:
        read_checked(path)
    message = str(err.value)
    assert "line 3" in message and "'maybe'" in message
    assert "\n" not in message  # the CLI prints it on one line


def test_line_numbers_count_quoted_line_breaks(tmp_path):
    # Hand-worked: the header is line 1; the first row's term holds a line
    # break, so that row spans lines 2-3 and the next row starts on line 4.
    path = tmp_path / "sample.csv"
    write_rows(path, [HEADER, ["two\nlines", "a.wav", "1", "2", "y"],
                      ["beta", "a.wav", "3", "4", "x"]])
    with pytest.raises(TrawlError, match="line 4"):
        read_checked(path)


def test_missing_columns_are_listed(tmp_path):
    path = tmp_path / "sample.csv"
    write_rows(path, [["term", "start", "score"], ["alpha", "1.0", "0.3"]])
    with pytest.raises(TrawlError, match="broadcast, end, verdict"):
        read_checked(path)


def test_bad_number_names_the_row(tmp_path):
    path = tmp_path / "sample.csv"
    write_rows(path, [HEADER, ["alpha", "a.wav", "1.0", "1.5", ""],
                      ["beta", "a.wav", "abc", "2.5", "yes"]])
    with pytest.raises(TrawlError, match=r"line 3: start 'abc'"):
        read_checked(path)
    write_rows(path, [HEADER, ["alpha", "a.wav", "2.0", "1.5", ""]])
    with pytest.raises(TrawlError, match="line 2: end"):
        read_checked(path)


def test_bom_semicolons_and_extra_columns(tmp_path):
    # A spreadsheet in a decimal-comma locale: BOM, ';' separators, '2,5' for
    # 2.5, columns in another order and a column of its own.
    path = tmp_path / "sample.csv"
    write_rows(path, [["Verdict", "Term", "Broadcast", "Start", "End", "Notes"],
                      ["Yes", "alpha", "news/a; b.wav", "2,5", "3,25", "clear, loud"]],
               delimiter=";", bom=True)
    assert read_checked(path) == [CheckedRow("alpha", "news/a; b.wav", 2.5, 3.25, True, 2)]


def test_tabs_and_blank_lines(tmp_path):
    path = tmp_path / "sample.tsv"
    path.write_text("term\tbroadcast\tstart\tend\tverdict\r\n\r\nalpha\ta.wav\t1\t2\tno\r\n",
                    encoding="utf-8")
    assert read_checked(path) == [CheckedRow("alpha", "a.wav", 1.0, 2.0, False, 3)]


def test_not_utf8(tmp_path):
    path = tmp_path / "sample.csv"
    path.write_bytes("term,broadcast,start,end,verdict\ncaf\u00e9,a.wav,1,2,y\n".encode("cp1252"))
    with pytest.raises(TrawlError, match="not UTF-8"):
        read_checked(path)


def test_sample_hash_is_sha256_of_bytes(tmp_path):
    # Reference library: hashlib.
    path = tmp_path / "sample.csv"
    write_rows(path, [HEADER, ["alpha", "a.wav", "1", "2", "y"]])
    assert sample_hash(path) == hashlib.sha256(path.read_bytes()).hexdigest()
    before = sample_hash(path)
    write_rows(path, [HEADER, ["alpha", "a.wav", "1", "2", "n"]])
    assert sample_hash(path) != before
