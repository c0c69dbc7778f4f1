"""One name per thing on the command line: --csv and --json where a user expects them, words in help.

JSON is parsed with the standard library (RFC 8259); option-argument names in help are words
(FILE, DIR, N) as in POSIX.1-2017 XBD 12.1 "Utility Argument Syntax", never Python types.
"""

import json

import pytest
from typer.testing import CliRunner

from detector.cli import app

runner = CliRunner()


def run(*args):
    r = runner.invoke(app, [str(a) for a in args], env={"COLUMNS": "100"})
    return r.exit_code, r.stdout + (r.stderr if r.stderr_bytes is not None else "")


COMMANDS = [["index"], ["search"], ["calibrate"], ["adapt"], ["evaluate"], ["demo"], ["status"], ["check"],
            ["rules", "set"], ["rules", "show"], ["rules", "try"], ["rules", "clear"]]


@pytest.mark.parametrize("command", COMMANDS, ids=" ".join)
def test_help_names_what_an_option_takes_in_words(command):
    code, text = run(*command, "--help")
    assert code == 0, text
    assert "<bool>" not in text and "<list[" not in text and "<path>" not in text and "<int>" not in text


def test_json_on_index_and_status(check_archive, tmp_path):
    archive, index, _ = check_archive
    r = runner.invoke(app, ["index", str(archive), "--index", str(tmp_path / "idx"), "--json"])
    assert r.exit_code == 0, r.stdout
    rep = json.loads(r.stdout)  # the progress bar goes to stderr
    # hand-worked: the archive holds two 6-second recordings
    assert sorted(rep["indexed"]) == ["news/monday.wav", "news/tuesday.wav"] and rep["failed"] == []
    assert rep["audio_seconds"] == pytest.approx(12.0)
    r = runner.invoke(app, ["status", "--index", str(index), "--json"])
    assert r.exit_code == 0, r.stdout
    st = json.loads(r.stdout)
    assert st["broadcasts"] == 2 and st["calibration"] == "off" and st["query_map"] == "off"
    code, text = run("status", "--index", index)
    assert code == 0
    words = {w.strip("│ ") for line in text.splitlines() for w in line.split("│")}
    assert "yes" not in words and "no" not in words  # one word for a state: on/off


def test_suggest_writes_with_csv_and_with_its_old_name_out(check_archive, tmp_path):
    _, index, _ = check_archive
    terms = tmp_path / "terms.txt"
    terms.write_text("kalimboro\nsanu\n", encoding="utf-8")
    for name in ("--csv", "--out"):
        code, text = run("calibrate", "--index", index, "--suggest", 4, "--terms", terms, name, tmp_path / f"s{name}.csv")
        assert code == 0, text
        assert "trawl check" in text
    assert (tmp_path / "s--csv.csv").read_bytes() == (tmp_path / "s--out.csv").read_bytes()
    header = (tmp_path / "s--csv.csv").read_text(encoding="utf-8").splitlines()[0]
    # ../shared/CONTRACTS.md, "Hit lists": the fixed columns in order, then verdict, then extra columns
    cols = header.split(",")
    assert cols[:9] == ["term", "broadcast", "start", "end", "start_hms", "end_hms", "score", "confidence", "rank"]
    assert "verdict" in cols and cols.index("verdict") in (9, 10)


def test_rules_try_shows_both_stages_and_unknown_signs(check_archive, tmp_path):
    from detector.models import load

    rules = tmp_path / "mine.rules"
    rules.write_text("ch -> ts\n", encoding="utf-8")
    if "\u00f8" in load(None).symbols:
        pytest.skip("this model reads ø; the warning needs a sign it does not know")
    code, text = run("rules", "try", "--rules", rules, "--index", check_archive[1], "chako", "chø")
    assert code == 0, text
    rows = [[c.strip() for c in line.split("│")[1:-1]] for line in text.splitlines() if line.startswith("│")]
    # hand-worked with the README's rule syntax: every 'ch' becomes 'ts'; no learned rules in this index
    assert rows[0][:4] == ["chako", "tsako", "-", "tsako"]
    assert rows[1][3] == "tsø" and "U+00F8" in rows[1][4]
    assert "warning:" in text
    code, text = run("rules", "try", "chako")
    assert code == 1 and "give a rules file" in text


def test_hits_table_keeps_broadcast_paths_whole_at_80_columns():
    """At 80 columns the compact layout prints each broadcast path on one line (hand-made hits;
    times hand-worked: 3723.46 s is 1 h 2 min 3.5 s to the tenth)."""
    import io

    from rich.console import Console

    from detector.cli import hits_table
    from detector.hits import Hit

    path = "news/morning-bulletin-01.opus"
    hits = [Hit("kalimboro", path, 3723.46, 3724.0, -1.0, 0.91, rank=1), Hit("sanu", "phone-in/open-line-02.opus", 5.0, 5.5, -2.0, 0.4, rank=1)]
    buf = io.StringIO()
    Console(file=buf, width=80).print(hits_table(hits, calibrated=False, title="hits", width=80))
    text = buf.getvalue()
    assert max(len(line) for line in text.splitlines()) <= 80
    assert path in text and "phone-in/open-line-02.opus" in text
    assert "1:02:03.5-1:02:04.0" in text
