"""Hit times refined from the audio land on the best-matching span at 20 ms resolution."""


from detector import api
from detector.models import load
from detector.refine import SHIFT, refine
from conftest import aligned_words, read_utterance


def test_refine_recovers_the_span_a_query_vector_came_from(corpus, tmp_path):
    import soundfile as sf

    x = read_utterance(corpus, "mbA00004")
    sf.write(str(tmp_path / "b.wav"), x, 16000)
    s, e, _ = max(aligned_words(corpus, "mbA00004"), key=lambda w: w[1] - w[0])
    s, e = round(s / 0.02) * 0.02, round(e / 0.02) * 0.02  # a span on the 20 ms grid
    target = api.embed_spans(x, 16000, [(s, e)])[0]  # the query vector is that span's own embedding
    got = refine(load(), target, tmp_path / "b.wav", s + 0.06, e + 0.06)  # the stored window was 60 ms late
    assert abs(got[0] - s) < 1e-6 and abs(got[1] - e) < 1e-6, got
    got = refine(load(), target, tmp_path / "b.wav", s - 0.04, e - 0.04)
    assert abs(got[0] - s) < 1e-6 and abs(got[1] - e) < 1e-6, got
    assert SHIFT >= 0.06
