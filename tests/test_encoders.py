"""Encoders against torchvision (key names, shapes and features) and hand-counted parameters."""
from __future__ import annotations

import pytest

torch = pytest.importorskip("torch")

from warmstart.encoders import EncoderSpec, Stage, build_encoder, encoder_from_spec  # noqa: E402


@pytest.mark.parametrize("name", ["resnet18", "resnet34", "resnet50"])
def test_resnet_matches_torchvision_key_for_key_and_feature_for_feature(name):
    import torchvision
    from torchvision.models.feature_extraction import create_feature_extractor

    torch.manual_seed(0)
    ref = getattr(torchvision.models, name)(weights=None).eval()  # torchvision's reference network
    ours = build_encoder(name, in_channels=3).eval()
    ref_sd = {k: v for k, v in ref.state_dict().items() if not k.startswith("fc.")}
    assert {k: tuple(v.shape) for k, v in ours.state_dict().items()} == {k: tuple(v.shape) for k, v in ref_sd.items()}
    ours.load_state_dict(ref_sd, strict=True)
    nodes = {"relu": "s0", "layer1": "s1", "layer2": "s2", "layer3": "s3", "layer4": "s4"}
    extractor = create_feature_extractor(ref, return_nodes=nodes)
    x = torch.randn(2, 3, 64, 64)
    with torch.no_grad():
        expect = extractor(x)
        got = ours(x)
    for g, key in zip(got, ["s0", "s1", "s2", "s3", "s4"]):
        torch.testing.assert_close(g, expect[key])
    assert [(f.shape[1], 64 // f.shape[-1]) for f in got] == [(s.channels, s.stride) for s in ours.spec.stages]


def test_one_channel_stem_and_narrow_variant():
    r = build_encoder("resnet18")
    assert r.conv1.weight.shape == (64, 1, 7, 7)
    n = build_encoder("resnet_narrow", in_channels=3, base_width=8)
    feats = n(torch.zeros(1, 3, 64, 64))
    assert [(f.shape[1], 64 // f.shape[-1]) for f in feats] == [(8, 2), (8, 4), (16, 8), (32, 16), (64, 32)]
    assert sum(p.numel() for p in build_encoder("resnet_narrow").parameters()) < 0.1 * sum(p.numel() for p in r.parameters())


def test_unet_parameter_count_by_hand():
    enc = build_encoder("unet", in_channels=1, base_width=4, depth=2, norm="batch")
    # 3x3 convs without bias (batch norm follows): 1*4*9 + 4*4*9 + 4*8*9 + 8*8*9, plus 2 BN params per channel
    by_hand = 36 + 144 + 288 + 576 + 2 * (4 + 4 + 8 + 8)
    assert sum(p.numel() for p in enc.parameters()) == by_hand
    assert list(enc.state_dict())[:2] == ["levels.0.conv1.weight", "levels.0.norm1.weight"]


@pytest.mark.parametrize("norm", ["batch", "group", "instance", "none"])
def test_unet_norms_and_strides(norm):
    enc = build_encoder("unet", in_channels=3, base_width=8, depth=4, norm=norm)
    feats = enc(torch.randn(2, 3, 32, 32))
    assert [(f.shape[1], 32 // f.shape[-1]) for f in feats] == [(8, 1), (16, 2), (32, 4), (64, 8)]


def test_spec_roundtrip_and_rebuild():
    enc = build_encoder("resnet_narrow", base_width=8)
    spec = EncoderSpec.from_dict(enc.spec.to_dict())
    again = encoder_from_spec(spec)
    assert {k: v.shape for k, v in again.state_dict().items()} == {k: v.shape for k, v in enc.state_dict().items()}
    wrong = EncoderSpec("resnet_narrow", {"base_width": 8}, (Stage(99, 2),))
    with pytest.raises(ValueError, match="stages"):
        encoder_from_spec(wrong)


def test_registry_errors():
    with pytest.raises(ValueError, match="unknown encoder"):
        build_encoder("vgg11")
    with pytest.raises(ValueError, match="no parameter 'width'"):
        build_encoder("unet", width=3)
    with pytest.raises(ValueError, match="norm"):
        build_encoder("unet", norm="layer")


@pytest.mark.parametrize("encoder, params", [("unet", {"base_width": 8, "depth": 4}), ("resnet18", {})])
def test_channels_last_gives_the_same_step_as_the_default_layout(encoder, params):
    # One SimCLR step's loss and gradients agree between memory layouts up to float rounding
    # (PyTorch's channels_last only changes the order in memory).
    import copy

    from warmstart.encoders import build_encoder
    from warmstart.encoders.memory import module_channels_last, to_channels_last
    from warmstart.pretrain.methods import build_method

    torch.manual_seed(0)
    a = build_method("simclr", build_encoder(encoder, in_channels=1, **params))
    b = module_channels_last(copy.deepcopy(a))
    conv = next(p for p in b.parameters() if p.dim() == 4 and p.shape[1] > 1)
    assert conv.is_contiguous(memory_format=torch.channels_last) and not conv.is_contiguous()
    x1, x2 = torch.randn(8, 1, 64, 64), torch.randn(8, 1, 64, 64)
    la, _ = a.loss(x1, x2)
    lb, _ = b.loss(to_channels_last(x1), to_channels_last(x2))
    la.backward()
    lb.backward()
    torch.testing.assert_close(la, lb, rtol=1e-5, atol=1e-5)
    for (name, pa), pb in zip(a.named_parameters(), b.parameters()):
        if pa.grad is not None:  # float32 sums in another order: equal to a relative 1e-4 of the gradient
            assert float((pa.grad - pb.grad).norm() / pa.grad.norm().clamp_min(1e-12)) < 1e-4, name
    assert {k: v.contiguous() for k, v in b.state_dict().items()}.keys() == a.state_dict().keys()
