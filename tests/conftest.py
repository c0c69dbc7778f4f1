import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
CORPORA = ROOT.parent / "shared" / "corpora"
CORPUS = CORPORA / "mboshi"
RUNTIME = ("onnxruntime", "numpy", "librosa", "soundfile", "hnswlib", "typer", "rich", "starlette", "uvicorn", "anyascii")  # pyproject's dependencies


def pytest_sessionstart(session):
    """One line, not a collection traceback per module, when this interpreter lacks the project's runtime."""
    import importlib.util

    missing = [m for m in RUNTIME if importlib.util.find_spec(m) is None]
    if missing:
        pytest.exit(f"{sys.executable} lacks the project's runtime ({', '.join(missing)}): install it first, "
                    "e.g. with the README's test command (pip install -e '.[test,train]')", returncode=4)


@pytest.fixture(scope="session")
def corpus():
    if not (CORPUS / "words.tsv").exists():
        pytest.skip("the shared Mboshi corpus (../shared/corpora/mboshi) is not beside this checkout")
    return CORPUS


def read_utterance(corpus, utt):
    import soundfile as sf

    x, sr = sf.read(str(corpus / "audio" / f"{utt}.opus"), dtype="float32")
    assert sr == 16000
    return x


def aligned_words(corpus, utt):
    out = []
    for line in (corpus / "words.tsv").read_text(encoding="utf-8").splitlines()[1:]:
        u, s, e, w = line.split("\t")
        if u == utt:
            out.append((float(s), float(e), w))
    return out


@pytest.fixture(scope="session")
def joined_broadcast(corpus, tmp_path_factory):
    """A few corpus utterances joined into one file with 0.5 s pauses, and their word times."""
    import numpy as np
    import soundfile as sf

    utts = ["mbA00002", "mbA00004", "mbA00006", "mbA00008", "mbA00009", "mbA00010"]
    pieces, words, t = [], [], 0.0
    for u in utts:
        x = read_utterance(corpus, u)
        words += [(t + s, t + e, w) for s, e, w in aligned_words(corpus, u)]
        pieces += [x, np.zeros(8000, np.float32)]
        t += (len(x) + 8000) / 16000
    folder = tmp_path_factory.mktemp("archive")
    (folder / "station").mkdir()
    sf.write(str(folder / "station" / "joined.wav"), np.concatenate(pieces), 16000)
    return folder, "station/joined.wav", words


@pytest.fixture(scope="module")
def check_archive(tmp_path_factory):
    """For `trawl check`: an archive of two constructed recordings (tones, 6 s each, 16 kHz), its
    index, and a 5-hit sample CSV written by the search's own CSV writer (one term formula-guarded)."""
    import numpy as np
    import soundfile as sf

    from detector.export import write_csv
    from detector.hits import Hit
    from detector.indexing import index_archive

    root = tmp_path_factory.mktemp("check")
    archive = root / "archive"
    (archive / "news").mkdir(parents=True)
    t = np.arange(16000 * 6) / 16000
    for name, f0 in (("news/monday.wav", 220.0), ("news/tuesday.wav", 330.0)):
        x = 0.3 * np.sin(2 * np.pi * f0 * t) * (1 + np.sin(2 * np.pi * 3 * t)) / 2
        sf.write(str(archive / name), x.astype(np.float32), 16000, subtype="PCM_16")
    index = root / "idx"
    index_archive(archive, index)
    hits = [Hit("kalimboro", "news/monday.wav", 2.0, 2.5, -0.2, 0.6, 1),
            Hit("kalimboro", "news/tuesday.wav", 3.0, 3.6, -1.1, 0.4, 2),
            Hit("sanu peta", "news/monday.wav", 4.0, 4.4, -0.5, 0.5, 1),
            Hit("=tofeku", "news/tuesday.wav", 1.0, 1.5, -0.7, 0.5, 1),
            Hit("sanu peta", "news/tuesday.wav", 5.0, 5.5, -2.0, 0.2, 2)]
    sample = root / "sample.csv"
    write_csv(hits, sample, calibrated=False)
    return archive, index, sample


def start_check(check_archive, folder):
    """`trawl check COPY_OF_SAMPLE --index IDX --no-browser` in a subprocess: (process, first stdout line, copy)."""
    import shutil
    import subprocess

    _, index, sample = check_archive
    mine = folder / "sample.csv"
    shutil.copy(sample, mine)
    proc = subprocess.Popen([sys.executable, "-c", "from detector.cli import app; app()", "check", str(mine),
                             "--index", str(index), "--no-browser"], cwd=ROOT, stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True)
    return proc, proc.stdout.readline().strip(), mine
