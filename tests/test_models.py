"""Every registered backbone: forward, backward, gradients; weights loaded from a local file."""

from __future__ import annotations

import pytest
import torch

from trainkit.models import BACKBONES, HEADS, create_model
from trainkit.training import Preprocess, class_weights, get_lr


@pytest.mark.parametrize("name", sorted(BACKBONES))
def test_forward_backward_and_every_parameter_gets_a_gradient(name):
    torch.manual_seed(0)
    model = create_model(name, 6)
    model.train()
    x = torch.randn(2, 3, 64, 64)
    out = model(x)
    assert out.shape == (2, 6) and torch.isfinite(out).all()
    out.logsumexp(1).sum().backward()
    missing = [
        n
        for n, p in model.named_parameters()
        if p.requires_grad and (p.grad is None or not torch.isfinite(p.grad).all())
    ]
    assert not missing
    assert any(n.startswith(HEADS[name]) for n, _ in model.named_parameters())


@pytest.mark.parametrize("name", ["tiny_cnn", "mobilenet_v3_small"])
def test_weights_file_loads_backbone_and_keeps_a_new_head(tmp_path, name):
    torch.manual_seed(1)
    source = create_model(name, 1000 if name != "tiny_cnn" else 7)
    path = tmp_path / "backbone.pth"
    torch.save(source.state_dict(), path)
    torch.manual_seed(2)
    model = create_model(name, 6, weights=path)
    src, got = source.state_dict(), model.state_dict()
    for k, v in got.items():
        if k.startswith(HEADS[name]):
            assert v.shape[0] == 6 or v.ndim == 0 or k.endswith("num_batches_tracked")
        else:
            assert torch.equal(v, src[k]), k


def test_bad_weights_and_names(tmp_path):
    with pytest.raises(
        ValueError, match="unknown backbone 'resnet9000'; choose one of: efficientnet_b0"
    ):
        create_model("resnet9000", 6)
    with pytest.raises(ValueError, match="does not exist"):
        create_model("tiny_cnn", 6, weights=tmp_path / "none.pth")
    wrong = tmp_path / "wrong.pth"
    torch.save(create_model("tiny_cnn", 6).state_dict(), wrong)
    with pytest.raises(ValueError, match="weights do not fit backbone 'resnet18'"):
        create_model("resnet18", 6, weights=wrong)
    junk = tmp_path / "junk.pth"
    junk.write_bytes(b"not a state dict")
    with pytest.raises(ValueError, match="not a loadable state dict"):
        create_model("tiny_cnn", 6, weights=junk)


def test_preprocess_matches_torchvision_normalize():
    """Inside-the-graph normalisation equals torchvision's Normalize on [0, 1] floats."""
    from torchvision.transforms import v2

    x = torch.randint(0, 256, (2, 16, 16, 3), dtype=torch.uint8)
    ours = Preprocess()(x)
    ref = v2.Normalize(mean=(0.485, 0.456, 0.406), std=(0.229, 0.224, 0.225))(
        x.permute(0, 3, 1, 2).float() / 255.0
    )
    torch.testing.assert_close(ours, ref, atol=1e-5, rtol=1e-5)


def test_learning_rate_schedule():
    peak, total, warm = 1e-3, 100, 10
    lrs = [get_lr(s, total_steps=total, warmup_steps=warm, peak_lr=peak) for s in range(total + 1)]
    assert lrs[0] == pytest.approx(peak / warm) and lrs[9] == pytest.approx(peak)
    assert lrs[-1] == pytest.approx(0.01 * peak)
    assert all(a >= b for a, b in zip(lrs[9:], lrs[10:], strict=False))


def test_class_weights_match_sklearn_balanced():
    """'balanced' is proportional to scikit-learn's compute_class_weight('balanced')."""
    import numpy as np
    from sklearn.utils.class_weight import compute_class_weight

    y = np.array([0] * 50 + [1] * 10 + [2] * 40)
    ours = class_weights(y, 3, "balanced").numpy()
    ref = compute_class_weight("balanced", classes=np.arange(3), y=y)
    np.testing.assert_allclose(ours / ours.sum(), ref / ref.sum(), rtol=1e-6)
    assert class_weights(y, 4, "sqrt").numpy()[3] == 0.0
