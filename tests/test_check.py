"""`trawl check`: the server behind the checking page.

Status codes are those of RFC 9110 (HTTP Semantics): 403 Forbidden (§15.5.4), 404 Not Found
(§15.5.5), 409 Conflict (§15.5.10), 413 Content Too Large (§15.5.14), 415 Unsupported Media
Type (§15.5.16), 422 Unprocessable Content (§15.5.21), 400 Bad Request (§15.5.1). CSV rows
follow RFC 4180; the formula guard is the OWASP "CSV Injection" guidance (the project contract).
"""

import hashlib
import io
import os
import re
import shutil
import signal
import socket
import time
import urllib.request

import numpy as np
import pytest
import soundfile as sf

pytest.importorskip("starlette", reason="trawl check needs starlette (pip install -e '.[test]')")
pytest.importorskip("httpx", reason="starlette's test client needs httpx (pip install -e '.[test]')")
from starlette.testclient import TestClient  # noqa: E402

from conftest import start_check  # noqa: E402
from detector.check_server import MAX_POST_BYTES, Session, bind, make_app, open_session  # noqa: E402
from detector.checked import read_checked  # noqa: E402
from detector.checking import CheckFile, png_bytes, searched_form, spectrogram_image  # noqa: E402


def sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.fixture
def page(check_archive, tmp_path):
    """A client of the page's application over a copy of the sample, and the copy's path."""
    archive, index, sample = check_archive
    mine = tmp_path / "sample.csv"
    shutil.copy(sample, mine)
    s = open_session(mine, index)
    client = TestClient(make_app(s), base_url="http://127.0.0.1:8123")
    return client, f"/{s.secret}", mine, s


def post(client, url, body, **kw):
    return client.post(url, content=body, headers={"content-type": "application/json"} | kw.pop("headers", {}), **kw)


# ------------------------------------------------------------------ the secret
def test_requests_without_the_secret_are_refused(page):
    client, base, _, s = page
    assert client.get(base + "/").status_code == 200
    assert client.get(base + "/api/state").status_code == 200
    wrong = s.secret[:-1] + ("A" if s.secret[-1] != "A" else "B")  # same length, one character off
    for path in ("/", "/api/state", "/static/check.js", "/api/hits/0/audio", f"/{wrong}/",
                 f"/{wrong}/api/state", f"/api/state?secret={s.secret}", f"/x{s.secret}/api/state",
                 f"/{s.secret[:8]}/api/state"):
        r = client.get(path)
        assert r.status_code == 403, path  # RFC 9110 §15.5.4
        assert "kalimboro" not in r.text
    assert post(client, f"/{wrong}/api/hits/0", b'{"verdict": "yes"}').status_code == 403
    assert read_checked(page[2])[0].verdict is None  # and nothing was marked


def test_page_loads_only_local_scripts_and_styles(page):
    """The page must work offline: every script, style and other resource comes from this server
    (Content-Security-Policy, W3C CSP Level 3, forbids any other origin)."""
    client, base, _, _ = page
    r = client.get(base + "/")
    html = r.text
    assert "default-src 'none'" in r.headers["content-security-policy"]
    assert "http:" not in r.headers["content-security-policy"] and "https:" not in r.headers["content-security-policy"]
    refs = re.findall(r'(?:src|href)="([^"]+)"', html)
    assert refs and all(not re.match(r"^[a-z]+:|^//", ref) for ref in refs), refs
    for ref in refs:
        assert client.get(base + "/" + ref).status_code == 200, ref
    js = client.get(base + "/static/check.js").text
    assert "http://" not in js and "https://" not in js


# ------------------------------------------------------------------ paths
def test_no_request_reaches_the_file_system_as_a_path(page, check_archive, tmp_path):
    client, base, mine, _ = page
    archive = check_archive[0]
    for path in ("/static/..%2f..%2fsample.csv", "/static/%2e%2e/check_server.py", "/static/check.html%00.js",
                 "/static/..%2fcheck_server.py", "/api/hits/..%2f..%2fnews%2fmonday.wav/audio",
                 "/api/hits/5/audio", "/api/hits/-1/audio", "/api/hits/99999999999999999999/picture",
                 "/api/hits/1e0/audio", "/news/monday.wav", "/archive/news/monday.wav"):
        r = client.get(base + path)
        assert r.status_code in (403, 404), path  # RFC 9110 §15.5.4-5
        assert not r.content.startswith(b"RIFF"), path
    # a hit whose broadcast climbs out of the archive is never played, even if a listed broadcast
    secret_audio = archive.parent / "private.wav"
    shutil.copy(archive / "news" / "monday.wav", secret_audio)
    rows = mine.read_text(encoding="utf-8").replace("news/tuesday.wav,3.000", "news/../../private.wav,3.000")
    mine.write_text(rows, encoding="utf-8", newline="")
    s = Session(CheckFile(mine), archive, {"news/monday.wav", "news/tuesday.wav", "news/../../private.wav"})
    c2 = TestClient(make_app(s), base_url="http://127.0.0.1:8123")
    assert c2.get(f"/{s.secret}/api/hits/0/audio").status_code == 200
    r = c2.get(f"/{s.secret}/api/hits/1/audio")
    assert r.status_code == 404 and "outside the archive" in r.json()["error"]
    s.broadcasts = {"news/monday.wav"}  # a broadcast the index does not hold: refused too
    assert c2.get(f"/{s.secret}/api/hits/3/picture").status_code == 404


# ------------------------------------------------------------------ POSTs
def test_malformed_and_oversized_posts_are_refused_and_change_nothing(page):
    client, base, mine, _ = page
    before = sha(mine)
    url = base + "/api/hits/0"
    cases = [
        (b"yes", {}, 400),                                      # not JSON
        (b'{"verdict": "yes"', {}, 400),                        # cut-off JSON
        (b'["yes"]', {}, 400),                                  # not an object
        (b"\xff\xfe{}", {}, 400),                               # not UTF-8
        (b'{"verdict": "maybe"}', {}, 422),                     # not a verdict
        (b'{"verdict": true}', {}, 422),
        (b'{"verdict": "yes", "path": "/etc/passwd"}', {}, 422),  # unknown field
        (b"{}", {}, 422),
        (b'{"note": "two\\nlines"}', {}, 422),
        (b'{"note": 5}', {}, 422),
        (b'{"note": "' + b"x" * 501 + b'"}', {}, 422),          # longer than a note may be
        (b'{"verdict": "yes"}', {"content-type": "text/plain"}, 415),
        (b'{"verdict": "yes", "note": "' + b"x" * MAX_POST_BYTES + b'"}', {}, 413),
    ]
    for body, headers, status in cases:
        r = post(client, url, body, headers=headers)
        assert r.status_code == status, (body[:40], r.status_code, r.text)
    # an oversized body sent without a length (chunked transfer coding, RFC 9112 §7.1)
    r = client.post(url, content=iter([b'{"note": "', b"y" * MAX_POST_BYTES, b'"}']),
                    headers={"content-type": "application/json"})
    assert r.status_code == 413
    assert client.get(url).status_code == 405  # GET on a POST-only address: RFC 9110 §15.5.6
    assert sha(mine) == before


# ------------------------------------------------------------------ writing verdicts
def test_a_verdict_is_written_at_once_and_every_other_byte_kept(page):
    client, base, mine, _ = page
    before = mine.read_bytes()
    inode = os.stat(mine).st_ino
    r = post(client, base + "/api/hits/3", b'{"verdict": "no"}')
    assert r.status_code == 200 and r.json()["progress"] == {"checked": 1, "total": 5, "yes": 0, "no": 1}
    after = mine.read_bytes()
    old_lines, new_lines = before.split(b"\r\n"), after.split(b"\r\n")  # RFC 4180 records end in CRLF
    assert len(old_lines) == len(new_lines)
    changed = [i for i, (a, b) in enumerate(zip(old_lines, new_lines)) if a != b]
    assert changed == [4]  # the header is line 0: hit 3 is line 4, and nothing else moved
    assert new_lines[4] == old_lines[4][: -len(b",")] + b",no"  # only its empty verdict cell filled
    assert new_lines[4].startswith(b"'=tofeku,")  # the formula guard kept (OWASP)
    # written by rename (a new file replaced the old: POSIX rename(2)), no temporary file left
    assert os.stat(mine).st_ino != inode
    assert sorted(p.name for p in mine.parent.iterdir()) == ["sample.csv"]
    rows = read_checked(mine)  # still a valid checked sample
    assert [r.verdict for r in rows] == [None, None, None, False, None]
    assert rows[3].term == "=tofeku"


def test_a_note_adds_one_last_column_and_is_guarded(page):
    client, base, mine, _ = page
    assert post(client, base + "/api/hits/1", '{"verdict": "yes", "note": "=caller, not the host"}'.encode()).status_code == 200
    assert post(client, base + "/api/hits/2", b'{"note": "music over it"}').status_code == 200
    import csv

    table = list(csv.reader(io.StringIO(mine.read_text(encoding="utf-8"), newline="")))
    assert table[0][-2:] == ["verdict", "note"]
    assert all(len(row) == len(table[0]) for row in table)
    # a text cell a spreadsheet would run gets a leading quote (OWASP); the comma is quoted (RFC 4180)
    assert table[2][-2:] == ["yes", "'=caller, not the host"]
    assert table[3][-2:] == ["", "music over it"]
    state = client.get(base + "/api/state").json()
    assert state["hits"][1]["note"] == "=caller, not the host" and state["hits"][1]["verdict"] == "yes"
    rows = read_checked(mine)
    assert [r.verdict for r in rows] == [None, True, None, None, None]


def test_restarting_continues_where_the_user_stopped(page, check_archive):
    client, base, mine, _ = page
    for n, v in ((0, "yes"), (1, "no")):
        assert post(client, base + f"/api/hits/{n}", f'{{"verdict": "{v}"}}'.encode()).status_code == 200
    assert client.get(base + "/api/state").json()["resume"] == 2
    again = open_session(mine, check_archive[1])  # a new `trawl check` on the same file
    c2 = TestClient(make_app(again), base_url="http://127.0.0.1:8123")
    state = c2.get(f"/{again.secret}/api/state").json()
    assert state["resume"] == 2
    assert [h["verdict"] for h in state["hits"]] == ["yes", "no", None, None, None]
    assert state["progress"] == {"checked": 2, "total": 5, "yes": 1, "no": 1}


def test_a_file_changed_from_outside_is_reported_never_overwritten(page):
    client, base, mine, _ = page
    assert client.get(base + "/api/changed").json() == {"changed": False}
    text = mine.read_text(encoding="utf-8")
    outside = text.replace("kalimboro,news/monday.wav,2.000,2.500,00:00:02.000,00:00:02.500,-0.2000,0.6000,1,",
                           "kalimboro,news/monday.wav,2.000,2.500,00:00:02.000,00:00:02.500,-0.2000,0.6000,1,yes")
    assert outside != text
    mine.write_text(outside, encoding="utf-8", newline="")  # e.g. a spreadsheet saved it meanwhile
    assert client.get(base + "/api/changed").json() == {"changed": True}
    assert client.get(base + "/api/state").json()["changed"] is True
    r = post(client, base + "/api/hits/2", b'{"verdict": "no"}')
    assert r.status_code == 409  # RFC 9110 §15.5.10 Conflict
    assert mine.read_text(encoding="utf-8") == outside  # the other program's change stands
    # once the user loads the changed file, marking goes on from it
    assert post(client, base + "/api/reload", b"{}").status_code == 200
    assert post(client, base + "/api/hits/2", b'{"verdict": "no"}').status_code == 200
    assert [r.verdict for r in read_checked(mine)] == [True, None, False, None, None]


# ------------------------------------------------------------------ audio and picture
def test_audio_is_the_hit_with_context_cut_from_the_original(page, check_archive):
    client, base, _, _ = page
    archive = check_archive[0]
    original = archive / "news" / "monday.wav"
    stamp = (sha(original), os.stat(original).st_mtime_ns)
    listing = sorted(p.relative_to(archive) for p in archive.rglob("*"))
    r = client.get(base + "/api/hits/0/audio")  # kalimboro, monday, 2.0-2.5 s
    assert r.status_code == 200 and r.headers["content-type"] == "audio/wav"
    clip, sr = sf.read(io.BytesIO(r.content), dtype="float32")
    x, _ = sf.read(str(original), dtype="float32")
    # hand-worked: 1.5 s of context either side of 2.0-2.5 s is 0.5-4.0 s, samples 8000..64000 at 16 kHz
    assert sr == 16000 and float(r.headers["x-clip-start"]) == 0.5
    assert len(clip) == 56000
    np.testing.assert_allclose(clip, x[8000:64000], atol=1 / 32768)  # both 16-bit PCM
    assert (sha(original), os.stat(original).st_mtime_ns) == stamp
    assert sorted(p.relative_to(archive) for p in archive.rglob("*")) == listing  # nothing written there


def test_picture_marks_the_hits_span(page):
    PIL = pytest.importorskip("PIL.Image", reason="Pillow decodes the PNG (pip install -e '.[test]')")
    client, base, _, _ = page
    r = client.get(base + "/api/hits/2/picture")  # sanu peta, monday, 4.0-4.4 s; clip 2.5-5.9 s
    assert r.status_code == 200 and r.headers["content-type"] == "image/png"
    img = np.asarray(PIL.open(io.BytesIO(r.content)).convert("RGB"))  # Pillow as the reference PNG decoder
    # hand-worked: one column per 10 ms (hop 160 at 16 kHz); the span starts 1.5 s and ends 1.9 s
    # into the clip, so its edges are columns 150 and 190
    yellow = np.all(img == (255, 214, 10), axis=2)
    full = np.flatnonzero(yellow.all(axis=0))
    assert list(full) == [150, 190]
    assert yellow[0, 150:191].all() and not yellow[0, :150].any() and not yellow[0, 191:].any()
    assert img.shape[0] == 160 and img.shape[1] == pytest.approx(340, abs=2)  # 3.4 s of clip


def test_png_writer_round_trips_through_pillow():
    PIL = pytest.importorskip("PIL.Image", reason="Pillow decodes the PNG (pip install -e '.[test]')")
    rng = np.random.default_rng(1)
    img = rng.integers(0, 256, (7, 13, 3), dtype=np.uint8)
    back = np.asarray(PIL.open(io.BytesIO(png_bytes(img))).convert("RGB"))
    np.testing.assert_array_equal(back, img)
    assert spectrogram_image(np.zeros(1600, np.float32), 16000, (0.02, 0.05)).shape == (160, 11, 3)


def test_term_as_searched_applies_the_index_rules():
    class FakeIndex:  # the two things searched_form reads from an index
        def read_text(self, name):
            return "ch -> ts\n^h ->\n" if name == "rules.txt" else None

        def read_setting(self, name):
            return None

    # hand-worked with the README's rule syntax: 'ch' becomes 'ts', a word-initial 'h' is dropped
    assert searched_form(FakeIndex(), "Hachiku") == "atsiku"


# ------------------------------------------------------------------ the command
def test_binds_to_loopback_only():
    sock = bind(0)
    try:
        host, port = sock.getsockname()
        assert host == "127.0.0.1" and port > 0
        # another address of this machine (the one a datagram towards another network would leave from;
        # connect() on UDP sends nothing) must not reach the server
        probe = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
        try:
            probe.connect(("192.0.2.1", 9))  # TEST-NET-1 (RFC 5737): never a real host
            other = probe.getsockname()[0]
        except OSError:
            other = None
        finally:
            probe.close()
        if other and not other.startswith("127."):
            c = socket.socket()
            c.settimeout(2)
            with pytest.raises(OSError):
                c.connect((other, port))
            c.close()
    finally:
        sock.close()


def test_the_command_prints_the_address_first_serves_and_stops_on_ctrl_c(check_archive, tmp_path):
    proc, first, _ = start_check(check_archive, tmp_path)
    try:
        m = re.fullmatch(r"http://127\.0\.0\.1:(\d+)/([A-Za-z0-9_-]{20,})/", first)
        assert m, first
        for _ in range(50):  # the address is printed before uvicorn starts accepting
            try:
                with urllib.request.urlopen(first + "api/state", timeout=2) as r:
                    state = r.read().decode()
                break
            except OSError:
                time.sleep(0.1)
        assert '"kalimboro"' in state
        with pytest.raises(urllib.error.HTTPError) as e:
            urllib.request.urlopen(f"http://127.0.0.1:{m.group(1)}/api/state", timeout=2)
        assert e.value.code == 403
    finally:
        proc.send_signal(signal.SIGINT)  # Ctrl-C
        out, err = proc.communicate(timeout=20)
    assert proc.returncode == 130, err  # ../shared/CONTRACTS.md, "Exit codes": 130 interrupted
    assert "stopped: 0 of 5 hits checked" in err and "Traceback" not in err


def test_a_sample_that_is_not_a_hit_list_is_refused_in_one_line(check_archive, tmp_path):
    from typer.testing import CliRunner

    from detector.cli import app

    bad = tmp_path / "bad.csv"
    bad.write_text("term,broadcast,start\r\nkalimboro,news/monday.wav,2.0\r\n", encoding="utf-8")
    r = CliRunner().invoke(app, ["check", str(bad), "--index", str(check_archive[1]), "--no-browser"])
    text = r.stdout + (r.stderr if r.stderr_bytes is not None else "")
    assert r.exit_code == 1 and "lacks the column(s) end, verdict" in text and "Traceback" not in text
    other = tmp_path / "other.csv"
    other.write_text(check_archive[2].read_text(encoding="utf-8").replace("news/monday.wav", "news/friday.wav"),
                     encoding="utf-8", newline="")
    r = CliRunner().invoke(app, ["check", str(other), "--index", str(check_archive[1]), "--no-browser"])
    text = r.stdout + (r.stderr if r.stderr_bytes is not None else "")
    assert r.exit_code == 1 and "news/friday.wav is not in the index" in text


def test_clips_written_inside_the_archive_are_not_indexed_as_broadcasts(check_archive, tmp_path):
    from detector.clips import write_clips
    from detector.hits import Hit
    from detector.indexing import find_audio

    archive = tmp_path / "archive"
    shutil.copytree(check_archive[0], archive)
    written = write_clips([Hit("kalimboro", "news/monday.wav", 2.0, 2.5, -0.2, 0.6, 1)], archive / "clips", archive)
    assert len(written) == 1 and written[0].exists()
    found = sorted(p.relative_to(archive).as_posix() for p in find_audio(archive))
    assert found == ["news/monday.wav", "news/tuesday.wav"]  # the clip is not one of them
