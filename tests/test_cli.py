"""The command line: one-line errors with non-zero exits, the CSV/JSON contract, nothing half-written."""

import csv
import hashlib
import json

import pytest
from typer.testing import CliRunner

from detector.cli import app

runner = CliRunner()
COLUMNS = ["term", "broadcast", "start", "end", "start_hms", "end_hms", "score", "confidence", "rank", "verdict"]
# after the contract's columns (../shared/CONTRACTS.md: "then any extra columns of yours"), sorted, as the README lists them
EXTRA = ["expected_count", "searched", "threshold_applied", "twv_threshold"]


def run(*args):
    r = runner.invoke(app, [str(a) for a in args])
    return r.exit_code, r.stdout + (r.stderr if r.stderr_bytes is not None else "")


@pytest.fixture(scope="module")
def index(joined_broadcast, tmp_path_factory):
    folder, _, _ = joined_broadcast
    idx = tmp_path_factory.mktemp("cli") / "idx"
    code, text = run("index", folder, "--index", idx)
    assert code == 0, text
    return idx


def one_line_error(text):
    lines = [ln for ln in text.strip().splitlines() if ln.strip()]
    return len(lines) == 1 and lines[0].startswith("error:") and "Traceback" not in text


def test_missing_index(tmp_path):
    code, text = run("search", "ngá", "--index", tmp_path / "nothing")
    assert code == 1 and one_line_error(text)


def test_term_without_letters(index):
    code, text = run("search", "1234 !!", "--index", index)
    assert code == 1 and one_line_error(text) and "no letters" in text


def test_empty_archive_leaves_nothing(tmp_path):
    (tmp_path / "empty").mkdir()
    code, text = run("index", tmp_path / "empty", "--index", tmp_path / "idx")
    assert code == 1 and one_line_error(text)
    assert not (tmp_path / "idx").exists()


def test_csv_and_json_carry_the_documented_fields(index, tmp_path):
    out = tmp_path / "hits.csv"
    code, text = run("search", "mósωngώsώ", "=danger", "--index", index, "--top", "3", "--csv", out)
    assert code == 0, text
    with open(out, newline="", encoding="utf-8") as f:  # read back with the stdlib csv module
        rows = list(csv.reader(f))
    assert rows[0] == COLUMNS + EXTRA
    assert len(rows) == 7 and [r[8] for r in rows[1:4]] == ["1", "2", "3"]
    assert {r[0] for r in rows[1:]} == {"mósωngώsώ", "'=danger"}  # OWASP formula guard on text cells
    code, text = run("search", "mósωngώsώ", "--index", index, "--top", "2", "--json")
    data = json.loads(text)
    assert [list(d.keys()) for d in data] == [COLUMNS + EXTRA, COLUMNS + EXTRA]
    assert data[0]["start"] == float(rows[1][2])


def tree_hash(folder):
    h = hashlib.sha256()
    for p in sorted(folder.rglob("*")):
        if p.is_file():
            h.update(p.name.encode() + p.read_bytes())
    return h.hexdigest()


@pytest.mark.parametrize("body, message", [
    ("term,broadcast,start\nx,y,1\n", "verdict"),
    ("term,broadcast,start,end,verdict\nngá,station/joined.wav,1.0,1.5,maybe\n", "maybe"),
    ("term,broadcast,start,end,verdict\nngá,elsewhere.wav,1.0,1.5,yes\nngá,elsewhere.wav,3.0,3.5,no\n", "not in the index"),
    ("term,broadcast,start,end,verdict\nngá,station/joined.wav,1.0,1.5,yes\nokándá,station/joined.wav,3.0,3.5,yes\n", "marked yes"),
])
def test_malformed_checked_sample_changes_nothing(index, tmp_path, body, message):
    sample = tmp_path / "sample.csv"
    sample.write_text(body, encoding="utf-8")
    before = tree_hash(index)
    code, text = run("calibrate", "--index", index, "--checked", sample)
    assert code == 1 and one_line_error(text), text
    assert message in text
    assert tree_hash(index) == before


def test_more_like_this_finds_the_example_itself_first(index):
    """Search by example: an indexed stretch as the query ranks that stretch first (cosine 1 with itself).

    The text hit's times come from the letter alignment, the example hit's from the stored window
    that best covers them: the two overlap, the window holding the hit's midpoint."""
    from detector.search import Searcher

    s = Searcher(index)
    h = s.search("mósωngώsώ", top=1)[0]
    code, text = run("search", "--like", f"{h.broadcast}@{h.start}-{h.end}", "--index", index, "--top", "1",
                     "--json", "--no-refine")
    assert code == 0, text
    got = json.loads(text)[0]
    assert got["broadcast"] == h.broadcast
    assert got["start"] <= (h.start + h.end) / 2 <= got["end"], (got, h)


def test_clips_hold_the_hit_with_half_a_second_around_it(index, tmp_path):
    import soundfile as sf

    code, text = run("search", "mósωngώsώ", "--index", index, "--top", "2", "--json", "--no-refine",
                     "--clips", tmp_path / "clips")
    assert code == 0, text
    hits = json.loads(text)
    clips = sorted((tmp_path / "clips").glob("*.wav"))
    assert len(clips) == 2
    for c in clips:
        info = sf.info(str(c))
        assert min(abs(info.duration - (h["end"] - h["start"] + 1.0)) for h in hits) < 0.01


def test_evaluate_prints_twv_for_a_transcribed_broadcast(index, joined_broadcast, tmp_path):
    _, name, words = joined_broadcast
    ref = tmp_path / "words.tsv"
    ref.write_text("broadcast\tstart\tend\tword\n" + "".join(f"{name}\t{s:.3f}\t{e:.3f}\t{w}\n" for s, e, w in words),
                   encoding="utf-8")
    terms = tmp_path / "terms.txt"
    terms.write_text("mósωngώsώ\nokándá\n", encoding="utf-8")
    code, text = run("evaluate", "--index", index, "--reference", ref, "--terms", terms, "--json")
    assert code == 0, text
    res = json.loads(text)
    assert set(res["per_term"]) == {"mósωngώsώ", "okándá"} and -1000 < res["mtwv"] <= 1.0
    assert res["per_term"]["okándá"]["occurrences"] == sum(1 for *_, w in words if w == "okándá")


@pytest.mark.parametrize("value, width", [("", 160), ("abc", 160), ("-5", 160), ("0", 160), ("100", 100)])
def test_an_odd_columns_variable_does_not_break_the_command(monkeypatch, value, width):
    """Environments set COLUMNS empty or to non-numbers; the CLI must still start (hand-worked widths)."""
    from detector.cli import _piped_width

    monkeypatch.setenv("COLUMNS", value)
    assert _piped_width() == width


def test_index_of_another_model_names_the_reindex_command_and_reindex_keeps_rules(joined_broadcast, tmp_path):
    """../shared/CONTRACTS.md, "Models and indexes": an index made with another model is refused in one
    line naming the command that re-indexes it; rules and learned rules carry over, a calibration is refitted."""
    folder, _, _ = joined_broadcast
    idx = tmp_path / "idx"
    assert run("index", folder, "--index", idx)[0] == 0
    rules = tmp_path / "mine.rules"
    rules.write_text("ph -> f\n", encoding="utf-8")
    assert run("rules", "set", "--index", idx, rules)[0] == 0
    (idx / "calibration.json").write_text("{}", encoding="utf-8")  # stands for the old model's calibration
    man = json.loads((idx / "trawl-index.json").read_text())
    man["model_card_sha256"] = "e" * 64  # as an index made with an earlier model
    (idx / "trawl-index.json").write_text(json.dumps(man))
    code, text = run("search", "--index", idx, "mbote")
    assert code == 1 and "another model" in text and "--reindex" in text
    assert len([line for line in text.strip().splitlines() if line.strip()]) == 1
    code, text = run("index", folder, "--index", idx, "--reindex")
    assert code == 0, text
    assert (idx / "rules.txt").read_text(encoding="utf-8") == "ph -> f\n"
    assert not (idx / "calibration.json").exists() and not (tmp_path / "idx.previous-model").exists()
    code, text = run("search", "--index", idx, "--json", "mbote")
    assert code == 0, text
