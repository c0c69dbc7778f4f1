"""Hit lists as CSV and JSON, read back with the standard library."""

from __future__ import annotations

import csv
import io
import json
import os

import pytest

from detector import TrawlError
from detector.export import format_hms, guard, hits_to_json, unguard, write_csv
from detector.hits import Hit

# Column order from CONTRACTS.md ("Hit lists").
CONTRACT_COLUMNS = ["term", "broadcast", "start", "end", "start_hms", "end_hms",
                    "score", "confidence", "rank"]

TRICKY_TERMS = [
    "plain",
    "comma, inside",
    'say "hello"',
    "two\nlines",
    "=SUM(A1)",
    "+1",
    "-x",
    "@a",
    "\tindent",
    "\rreturn",
    "ሰላም",  # Ethiopic
    "नमस्ते",  # Devanagari
    "bɔ̀ɔ́",  # open o with combining grave and acute (tone marks), no precomposed form
    "'=already quoted",  # a text quote before a trigger: must survive the round trip
    "'apostrophe",
]


def make_hits(terms=TRICKY_TERMS, **overrides):
    out = []
    for i, term in enumerate(terms):
        fields = dict(term=term, broadcast=f"news/{i:02d}, am.wav", start=12.3456 + i,
                      end=13.0 + i, score=-0.123456, confidence=0.87654, rank=i + 1,
                      accepted=bool(i % 2))
        fields.update(overrides)
        out.append(Hit(**fields))
    return out


def read_back(path):
    with open(path, encoding="utf-8", newline="") as f:
        return list(csv.reader(f))


def test_format_hms():
    # Hand-worked: 3725.5 s = 1 h + 2 min + 5.5 s.
    assert format_hms(3725.5) == "01:02:05.500"
    assert format_hms(0.0) == "00:00:00.000"
    # 59.9996 s rounds to 60.000 s, which carries into the minutes.
    assert format_hms(59.9996) == "00:01:00.000"
    # 100 hours: the hours field grows past two digits.
    assert format_hms(360000.25) == "100:00:00.250"
    with pytest.raises(TrawlError):
        format_hms(-1.0)


def test_columns_in_contract_order(tmp_path):
    hits = make_hits(["alpha"])
    hits[0].extra = {"zeta": 1, "model": "v2"}
    path = tmp_path / "hits.csv"
    write_csv(hits, path, calibrated=False)
    assert read_back(path)[0] == CONTRACT_COLUMNS + ["verdict", "model", "zeta"]
    write_csv(hits, path, calibrated=True)
    assert read_back(path)[0] == CONTRACT_COLUMNS + ["accepted", "verdict", "model", "zeta"]


def test_round_trip_with_stdlib_csv(tmp_path):
    hits = make_hits()
    path = tmp_path / "hits.csv"
    write_csv(hits, path, calibrated=True)
    rows = read_back(path)
    header, body = rows[0], rows[1:]
    assert len(body) == len(hits)
    col = {name: i for i, name in enumerate(header)}
    for h, row in zip(hits, body):
        assert unguard(row[col["term"]]) == h.term
        assert unguard(row[col["broadcast"]]) == h.broadcast
        assert row[col["verdict"]] == ""
        assert row[col["accepted"]] == ("yes" if h.accepted else "no")
    first = body[0]
    # 3 decimals for times, 4 for scores; hand-worked roundings.
    assert first[col["start"]] == "12.346"
    assert first[col["end"]] == "13.000"
    assert first[col["start_hms"]] == "00:00:12.346"
    assert first[col["rank"]] == "1"


def test_formula_guard_per_owasp(tmp_path):
    # OWASP "CSV Injection": cells starting with = + - @ tab or CR get a leading '.
    hits = make_hits(["=SUM(A1)", "+1", "-x", "@a", "\tt", "\rr", "safe", "'=q"])
    path = tmp_path / "hits.csv"
    write_csv(hits, path, calibrated=False)
    terms = [row[0] for row in read_back(path)[1:]]
    assert terms == ["'=SUM(A1)", "'+1", "'-x", "'@a", "'\tt", "'\rr", "safe", "''=q"]
    # Numeric cells are never guarded: score is negative here and stays "-0.1235".
    row = read_back(path)[1]
    assert row[6] == "-0.1235"
    assert row[2] == "12.346"
    assert row[7] == "0.8765"


def test_guard_on_broadcast_and_extra_text_not_numbers(tmp_path):
    hits = make_hits(["alpha"], broadcast="-tapes/side a.wav")
    hits[0].extra = {"note": "=HYPERLINK(1)", "offset": -2.5, "count": -3, "flag": True}
    path = tmp_path / "hits.csv"
    write_csv(hits, path, calibrated=False)
    header, row = read_back(path)
    cells = dict(zip(header, row))
    assert cells["broadcast"] == "'-tapes/side a.wav"
    assert cells["note"] == "'=HYPERLINK(1)"
    assert cells["offset"] == "-2.5"
    assert cells["count"] == "-3"
    assert cells["flag"] == "yes"


@pytest.mark.parametrize("text", TRICKY_TERMS + ["", "'", "''", "'+", "=", "''-x"])
def test_unguard_inverts_guard(text):
    assert unguard(guard(text)) == text


def test_rfc4180_bytes(tmp_path):
    # RFC 4180 section 2: CRLF between records (rule 1), fields with commas,
    # quotes or line breaks enclosed in double quotes (rule 6), a double quote
    # inside doubled (rule 7). UTF-8 without a byte-order mark.
    path = tmp_path / "hits.csv"
    write_csv(make_hits(['say "hi", then\ngo']), path, calibrated=False)
    data = path.read_bytes()
    assert not data.startswith(b"\xef\xbb\xbf")
    assert data.startswith(b"term,broadcast,start,end,start_hms,end_hms,score,confidence,rank,verdict\r\n")
    assert b'\r\n"say ""hi"", then\ngo","news/00, am.wav",12.346,' in data
    assert data.endswith(b"\r\n")


def test_non_latin_bytes_are_utf8(tmp_path):
    path = tmp_path / "hits.csv"
    write_csv(make_hits(["ሰላም", "bɔ̀ɔ́"]), path, calibrated=False)
    data = path.read_bytes()
    assert "ሰላም".encode("utf-8") in data
    # The combining marks are kept as written (not recomposed or dropped).
    assert "bɔ̀ɔ́".encode("utf-8") in data


def test_write_to_open_file():
    buffer = io.StringIO(newline="")
    write_csv(make_hits(["alpha"]), buffer, calibrated=False)
    rows = list(csv.reader(io.StringIO(buffer.getvalue(), newline="")))
    assert rows[1][0] == "alpha"


def test_atomic_write_keeps_old_file_on_failure(tmp_path):
    path = tmp_path / "hits.csv"
    write_csv(make_hits(["alpha"]), path, calibrated=False)
    before = path.read_bytes()
    broken = make_hits(["beta", "gamma"])
    broken[1].start = float("-inf")  # cannot be written as HH:MM:SS
    with pytest.raises(TrawlError):
        write_csv(broken, path, calibrated=False)
    assert path.read_bytes() == before
    assert os.listdir(tmp_path) == ["hits.csv"]  # no temporary file left behind


def test_extra_column_may_not_repeat_a_standard_one(tmp_path):
    hits = make_hits(["alpha"])
    hits[0].extra = {"score": 3}
    with pytest.raises(TrawlError, match="score"):
        write_csv(hits, tmp_path / "x.csv", calibrated=False)


def test_json_same_fields():
    hits = make_hits(["=SUM(A1)", "ሰላም"])
    hits[0].extra = {"model": "v2"}
    text = hits_to_json(hits, calibrated=True)
    assert "ሰላም" in text  # ensure_ascii=False
    records = json.loads(text)
    assert list(records[0]) == CONTRACT_COLUMNS + ["accepted", "verdict", "model"]
    assert records[0]["term"] == "=SUM(A1)"  # no spreadsheet guard in JSON
    assert records[0]["start"] == 12.346 and records[0]["score"] == -0.1235
    assert records[0]["rank"] == 1 and records[0]["accepted"] is False
    assert records[1]["accepted"] is True and records[1]["verdict"] == ""
    assert records[1]["model"] is None
    uncalibrated = json.loads(hits_to_json(hits, calibrated=False))
    assert "accepted" not in uncalibrated[0]
