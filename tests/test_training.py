"""The training pipeline in its quick mode: the loss falls, the export loads, ONNX matches torch."""

import numpy as np
import pytest

torch = pytest.importorskip("torch", reason="training needs the [train] extra (torch)")
pytest.importorskip("onnx", reason="training needs the [train] extra (onnx)")


@pytest.fixture(scope="module")
def quick(tmp_path_factory, corpus):
    from exporters.train import main

    out = tmp_path_factory.mktemp("models")
    work = tmp_path_factory.mktemp("work")
    final = main(["--quick", "--corpus", str(corpus), "--out", str(out), "--work", str(work)])
    return final, out


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
def quick_letters(quick, corpus):
    from exporters.train_letters import main

    _, out = quick
    card = main(["--quick", "--corpus", str(corpus), "--models", str(out)])
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
    got = sess.run(None, {"frames": fr, "logmel": lm})[0]
    with torch.no_grad():
        want = head(torch.from_numpy(fr), torch.from_numpy(lm)).numpy()
    assert got.shape == (1, 57, len(card["letters"]["alphabet"]) + 1)
    np.testing.assert_allclose(got, want, atol=1e-4)
