"""The training pipeline in its quick mode: the loss falls, the export loads, ONNX matches torch.

The quick run reads every shared corpus when ../shared is beside the checkout, and otherwise
trains on a few utterances it synthesises itself with espeak-ng, so a newcomer's test run
exercises the trainer too.
"""

import shutil

import numpy as np
import pytest

from conftest import CORPORA

torch = pytest.importorskip("torch", reason="training needs the [train] extra (torch)")
pytest.importorskip("onnx", reason="training needs the [train] extra (onnx)")


def _quick_run(tmp_path_factory, corpora):
    from exporters.train import main

    if not corpora.exists() and shutil.which("espeak-ng") is None:
        pytest.skip("neither ../shared/corpora nor espeak-ng: the quick run has no speech to train on")
    out = tmp_path_factory.mktemp("models")
    work = tmp_path_factory.mktemp("work")
    final = main(["--quick", "--corpora", str(corpora), "--out", str(out), "--work", str(work)])
    return final, out


@pytest.fixture(scope="module")
def quick(tmp_path_factory):
    """The quick run on the shared corpora where present, else on its own espeak-ng speech."""
    return _quick_run(tmp_path_factory, CORPORA)


@pytest.fixture(scope="module")
def quick_bare(tmp_path_factory):
    """The quick run as on a machine without ../shared."""
    return _quick_run(tmp_path_factory, tmp_path_factory.mktemp("no-shared") / "corpora")


@pytest.mark.slow
def test_quick_training_without_the_shared_corpora_learns_and_exports(quick_bare):
    from exporters.export_onnx import parity
    from exporters.train import model_from_state

    final, out = quick_bare
    before, after = final["probe_loss"]
    assert after < before, f"loss on a fixed batch went from {before:.3f} to {after:.3f}"
    assert final["card"]["training"]["corpora"] == {}
    assert final["card"]["training"]["synthetic_utterances"] > 0
    assert parity(model_from_state(final), out) < 1e-4


@pytest.mark.slow
def test_quick_run_reads_every_shared_corpus_in_its_role(quick):
    """Corpora without words.tsv (Swahili: transcripts only; Urdu: no transcripts) are read too."""
    if not CORPORA.exists():
        pytest.skip("../shared/corpora is not beside this checkout")
    corpora = quick[0]["card"]["training"]["corpora"]
    present = {p.name for p in CORPORA.iterdir() if (p / "utterances.tsv").exists()}
    assert set(corpora) == present
    assert corpora["swahili-read"]["letters"]["utterances"] > 0  # transcripts, no word times
    assert corpora["urdu-broadcast"]["channel"]["utterances"] > 0  # no transcripts at all
    assert "train" not in corpora["english-digits"]  # the unseen language is never trained on
    assert corpora["arabic-commands"]["held"]["speakers"] > 0


@pytest.mark.slow
def test_model_card_gives_every_corpus_and_voice_a_licence(quick):
    from exporters.model_card import CORPUS_LICENCES, render

    card = quick[0]["card"]
    text = render(card)
    training = card["training"]
    assert training["synthetic_voices"] or training["corpora"]
    for name in training["corpora"]:
        assert f"corpus `{name}`" in text and name in CORPUS_LICENCES
    for voice in training["synthetic_voices"]:
        row = next(line for line in text.splitlines() if f"voice `{voice}`" in line)
        assert "UNKNOWN" not in row and ("GPL" in row or "Apache" in row or "MBROLA" in row)
    assert "UNKNOWN" not in text


@pytest.mark.slow
def test_quick_training_lowers_the_loss(quick):
    final, _ = quick
    before, after = final["probe_loss"]
    assert after < before, f"loss on a fixed batch went from {before:.3f} to {after:.3f}"


@pytest.mark.slow
def test_export_loads_in_onnxruntime_and_matches_torch(quick):
    from exporters.export_onnx import parity
    from exporters.train import model_from_state
    from detector.models import Models

    final, out = quick
    m = Models(out)  # the runtime's own loader: card check and file hashes
    assert m.dim == final["card"]["embedding_dim"]
    assert parity(model_from_state(final), out) < 1e-4


@pytest.mark.slow
def test_numpy_pooling_matches_torch_pooling():
    from detector.pooling import pool as np_pool, prefix_sums
    from exporters.model import pool as torch_pool

    rng = np.random.default_rng(0)
    frames = rng.standard_normal((50, 6)).astype(np.float32)
    a = np.array([0, 3, 10, 40])
    b = np.array([3, 20, 11 + 3, 50])
    want = np_pool(frames, prefix_sums(frames), a, b)
    f = torch.from_numpy(frames)
    prefix = torch.cat([torch.zeros(1, 6), torch.cumsum(f, 0)])
    got = torch_pool(f, prefix, torch.from_numpy(a), torch.from_numpy(b)).numpy()
    np.testing.assert_allclose(got, want, atol=1e-5)
    # hand-worked: span (3, 20) has thirds [3, 9), [9, 14), [14, 20): n = 17, (n+1)//3 = 6, (2n+1)//3 = 11
    np.testing.assert_allclose(want[1, :6], frames[3:9].mean(0), atol=1e-6)
    np.testing.assert_allclose(want[1, 6:12], frames[9:14].mean(0), atol=1e-6)
    np.testing.assert_allclose(want[1, -1], np.log(17 * 0.02), atol=1e-6)


@pytest.fixture(scope="module")
def quick_letters(quick):
    from exporters.train_letters import main

    _, out = quick
    card = main(["--quick", "--corpora", str(CORPORA), "--models", str(out)])
    return card, out


@pytest.mark.slow
def test_quick_letter_head_learns_and_loads(quick_letters):
    from detector.letters import alphabet_of
    from detector.models import Models

    card, out = quick_letters
    t = card["letters"]["training"]
    assert t["dev_letter_error"] < t["dev_letter_error_untrained"]
    m = Models(out)  # the runtime loader checks the new file's hash in the card
    assert m.has_letters and m.alphabet == alphabet_of(m.symbols)


@pytest.mark.slow
def test_letter_head_onnx_matches_torch(quick_letters):
    import onnxruntime as ort

    from exporters.model import LetterHead

    card, out = quick_letters
    sess = ort.InferenceSession(str(out / "letter_head.onnx"), providers=["CPUExecutionProvider"])
    head = LetterHead(len(card["letters"]["alphabet"]), frame_dim=card["frame_dim"])
    # the exported graph's own weights, read back into torch through the initialisers
    import onnx
    from onnx import numpy_helper

    weights = {i.name: numpy_helper.to_array(i) for i in onnx.load(str(out / "letter_head.onnx")).graph.initializer}
    state = {k: torch.from_numpy(weights[k].copy()) for k in head.state_dict() if k in weights}
    assert len(state) == len(head.state_dict())
    head.load_state_dict(state)
    head.eval()
    rng = np.random.default_rng(1)
    fr = rng.standard_normal((1, 57, card["frame_dim"])).astype(np.float32)
    lm = rng.standard_normal((1, 113, 40)).astype(np.float32) - 5
    lm[0, 40:70] += np.linspace(-3, 3, 40, dtype=np.float32)  # a band colouring the sliding mean must follow
    got = sess.run(None, {"frames": fr, "logmel": lm})[0]
    with torch.no_grad():
        want = head(torch.from_numpy(fr), torch.from_numpy(lm)).numpy()
    assert got.shape == (1, 57, len(card["letters"]["alphabet"]) + 1)
    np.testing.assert_allclose(got, want, atol=1e-4)


@pytest.mark.slow
def test_letter_head_trains_on_transcripts_without_word_times(quick_letters):
    if not CORPORA.exists():
        pytest.skip("../shared/corpora is not beside this checkout")
    card, _ = quick_letters
    assert "swahili-read" in card["letters"]["training"]["corpora"]
    assert "english-digits" not in card["letters"]["training"]["corpora"]  # the unseen language


def test_sliding_mean_cancels_a_fixed_channel_colouring():
    """A fixed gain per band (a channel's colouring: additive in the log domain) cancels exactly,
    and a frame depends on no audio beyond NORM_HALF frames either side (hand-worked: the window
    mean of a constant offset is that offset)."""
    from exporters.model import NORM_HALF, sliding_mean_removed

    rng = np.random.default_rng(0)
    x = torch.from_numpy(rng.standard_normal((1, 400, 40)).astype(np.float32))
    colour = torch.from_numpy(rng.uniform(-4, 4, 40).astype(np.float32))
    np.testing.assert_allclose(sliding_mean_removed(x + colour).numpy(), sliding_mean_removed(x).numpy(), atol=1e-4)
    y = x.clone()
    y[0, 300:] += 10.0  # a change far after frame 100 must not reach it
    assert 300 - 100 > NORM_HALF
    np.testing.assert_allclose(sliding_mean_removed(y)[0, :100].numpy(), sliding_mean_removed(x)[0, :100].numpy(), atol=1e-5)
    # a padded batch with a mask gives each utterance what it gets alone
    mask = torch.zeros(1, 500)
    mask[0, :400] = 1
    padded = torch.cat([x, torch.full((1, 100, 40), -13.8)], 1)
    np.testing.assert_allclose(sliding_mean_removed(padded, mask)[0, :400].numpy(), sliding_mean_removed(x)[0].numpy(), atol=1e-4)


@pytest.mark.slow
def test_a_model_with_the_sliding_mean_keeps_the_bounded_context_contract(quick):
    """../shared/CONTRACTS.md, "Embeddings and evaluation": the same span gives the same vector
    (within 1e-4) in a short file and inside a much longer recording, using at most 2 s either side."""
    from detector import api
    from detector.models import Models

    _, out = quick
    m = Models(out)
    assert m.context_frames * 0.02 <= api.MAX_CONTEXT_SECONDS
    assert api.context_seconds(m) >= m.context_frames * 0.02  # the whole receptive field is taken
    rng = np.random.default_rng(3)
    short = (rng.standard_normal(16000 * 8) * 0.05).astype(np.float32)
    long = np.concatenate([(rng.standard_normal(16000 * 30) * 0.3).astype(np.float32), short,
                           (rng.standard_normal(16000 * 30) * 0.01).astype(np.float32)])
    span = (3.0, 3.6)
    a = api.embed_spans(short, 16000, [span], models_dir=str(out))
    b = api.embed_spans(long, 16000, [(span[0] + 30, span[1] + 30)], models_dir=str(out))
    np.testing.assert_allclose(a, b, atol=1e-4)


def test_runtime_reads_each_cards_own_normalisation_but_refuses_other_features():
    """The sliding mean lives inside the model files: a card describing it loads; a card with other
    feature settings (here 80 mel bands) is refused in one line."""
    import copy
    import json

    from detector import TrawlError
    from detector.models import check_card, models_dir

    card = json.loads((models_dir() / "card.json").read_text(encoding="utf-8"))
    other = copy.deepcopy(card)
    other["features"]["normalisation"] = "per-band sliding mean over ±0.75 s removed"
    check_card(other)
    other["features"]["n_mels"] = 80
    with pytest.raises(TrawlError, match="n_mels"):
        check_card(other)
