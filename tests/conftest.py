import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
CORPUS = ROOT.parent / "shared" / "corpora" / "mboshi"
RUNTIME = ("onnxruntime", "numpy", "librosa", "soundfile", "hnswlib", "typer", "rich", "anyascii")  # pyproject's dependencies


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
