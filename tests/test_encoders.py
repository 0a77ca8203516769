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


def _assert_same_gradients(a: torch.nn.Module, b: torch.nn.Module) -> None:
    for (name, pa), pb in zip(a.named_parameters(), b.parameters()):
        if pa.grad is not None:  # float32 sums in another order: equal to a relative 1e-4 of the gradient
            assert float((pa.grad - pb.grad).norm() / pa.grad.norm().clamp_min(1e-12)) < 1e-4, name


@pytest.mark.parametrize("encoder, params, shape", [
    ("unet", {"base_width": 8, "depth": 4}, (8, 1, 64, 64)),
    ("resnet18", {}, (8, 1, 64, 64)),
    ("unet", {"base_width": 4, "depth": 3, "spatial_dims": 3}, (4, 1, 16, 16, 16)),
])
def test_channels_last_gives_the_same_step_as_the_default_layout(encoder, params, shape):
    # One SimCLR step's loss and gradients agree between memory layouts up to float rounding
    # (PyTorch's channels_last / channels_last_3d only change the order in memory).
    import copy

    from warmstart.encoders import build_encoder
    from warmstart.encoders.memory import module_channels_last, to_channels_last
    from warmstart.pretrain.methods import build_method

    torch.manual_seed(0)
    a = build_method("simclr", build_encoder(encoder, in_channels=1, **params))
    b = module_channels_last(copy.deepcopy(a))
    fmt = torch.channels_last_3d if len(shape) == 5 else torch.channels_last
    conv = next(p for p in b.parameters() if p.dim() == len(shape) and p.shape[1] > 1)
    assert conv.is_contiguous(memory_format=fmt) and not conv.is_contiguous()
    x1, x2 = torch.randn(shape), torch.randn(shape)
    la, _ = a.loss(x1, x2)
    lb, _ = b.loss(to_channels_last(x1), to_channels_last(x2))
    la.backward()
    lb.backward()
    torch.testing.assert_close(la, lb, rtol=1e-5, atol=1e-5)
    _assert_same_gradients(a, b)
    assert {k: v.contiguous() for k, v in b.state_dict().items()}.keys() == a.state_dict().keys()


@pytest.mark.parametrize("shape", [(4, 1, 48, 48), (2, 1, 24, 24, 24)])
def test_fine_tuning_step_is_the_same_in_channels_last(shape):
    # The benchmark's step (reference U-Net with decoder and head, cross-entropy + soft Dice):
    # loss and gradients agree between layouts, in 2-D and 3-D.
    import copy

    from warmstart.bench.train import _loss
    from warmstart.encoders.memory import module_channels_last, to_channels_last
    from warmstart.unet import UNet

    torch.manual_seed(0)
    dims = {"spatial_dims": 3} if len(shape) == 5 else {}
    a = UNet("unet", classes=3, base_width=4, depth=3, **dims)
    b = module_channels_last(copy.deepcopy(a))
    x = torch.randn(shape)
    y = torch.randint(3, (shape[0], *shape[2:]))
    la, lb = _loss(a(x), y, 3, None), _loss(b(to_channels_last(x)), y, 3, None)
    la.backward()
    lb.backward()
    torch.testing.assert_close(la, lb, rtol=1e-5, atol=1e-5)
    _assert_same_gradients(a, b)


def test_single_channel_views_are_channels_last_without_a_copy():
    # A grayscale batch (C = 1) has the same memory in both layouts: the views need no conversion.
    from warmstart.encoders.memory import to_channels_last

    for shape in [(8, 1, 32, 32), (4, 1, 8, 16, 16)]:
        x = torch.randn(shape)
        assert to_channels_last(x).data_ptr() == x.data_ptr()
    x = torch.randn(8, 3, 32, 32)  # a 2.5-D stack of 3 slices: one copy
    y = to_channels_last(x)
    assert y.data_ptr() != x.data_ptr() and y.is_contiguous(memory_format=torch.channels_last)
    torch.testing.assert_close(x, y, rtol=0, atol=0)


def test_3d_unet_encoder_and_network():
    # 3x3x3 convolutions and 2x2x2 pooling: stage shapes halve along every axis; the spec records
    # spatial_dims only when 3 (2-D specs are unchanged) and rebuilds the same network.
    from warmstart.encoders import encoder_from_spec
    from warmstart.unet import UNet

    enc = build_encoder("unet", in_channels=1, base_width=4, depth=3, spatial_dims=3)
    feats = enc(torch.zeros(2, 1, 16, 24, 32))
    assert [tuple(f.shape) for f in feats] == [(2, 4, 16, 24, 32), (2, 8, 8, 12, 16), (2, 16, 4, 6, 8)]
    assert enc.spec.params["spatial_dims"] == 3
    assert "spatial_dims" not in build_encoder("unet", base_width=4, depth=3).spec.params
    again = encoder_from_spec(enc.spec)
    assert {k: v.shape for k, v in again.state_dict().items()} == {k: v.shape for k, v in enc.state_dict().items()}
    assert enc.levels[0].conv1.weight.shape == (4, 1, 3, 3, 3)
    net = UNet(enc.spec, classes=3)
    assert tuple(net(torch.zeros(1, 1, 16, 16, 16)).shape) == (1, 3, 16, 16, 16)
    with pytest.raises(ValueError, match="spatial_dims"):
        build_encoder("unet", spatial_dims=4)


def _count(module: torch.nn.Module) -> int:
    return sum(p.numel() for p in module.parameters())


def test_3d_parameter_counts_by_hand():
    # 3x3x3 kernels without bias (batch norm follows): weights cin * cout * 27, each norm 2 * cout.
    unet = build_encoder("unet", in_channels=1, base_width=4, depth=3, spatial_dims=3)
    by_hand = (1 * 4 * 27 + 8 + 4 * 4 * 27 + 8) + (4 * 8 * 27 + 16 + 8 * 8 * 27 + 16) + (8 * 16 * 27 + 32 + 16 * 16 * 27 + 32)
    assert _count(unet) == by_hand == 13612
    # residual: stem, one block per stage; a stride-2 block's skip is a 1x1x1 convolution and a norm
    res = build_encoder("unet_residual", in_channels=1, base_width=4, depth=3, spatial_dims=3)
    stem = 1 * 4 * 27 + 8
    stage0 = 4 * 4 * 27 + 8 + 4 * 4 * 27 + 8
    stage1 = 4 * 8 * 27 + 16 + 8 * 8 * 27 + 16 + 4 * 8 + 16
    stage2 = 8 * 16 * 27 + 32 + 16 * 16 * 27 + 32 + 8 * 16 + 32
    assert _count(res) == stem + stage0 + stage1 + stage2 == 14260
    # a learned downsampling adds a 2x2x2 convolution of stride 2 (with bias) per level change
    down = build_encoder("unet", in_channels=1, base_width=4, depth=3, spatial_dims=3, downsample="conv")
    assert _count(down) - _count(unet) == (4 * 4 * 8 + 4) + (8 * 8 * 8 + 8)


@pytest.mark.parametrize("name,params", [
    ("unet", {"spatial_dims": 3}), ("unet", {"spatial_dims": 3, "act": "leaky_relu", "downsample": "conv"}),
    ("unet_residual", {"spatial_dims": 3, "blocks": 2, "norm": "instance"}), ("unet_residual", {"norm": "group"}),
])
def test_stage_maps_have_the_strides_their_spec_states(name, params):
    enc = build_encoder(name, in_channels=1, base_width=4, depth=3, **params)
    dims = params.get("spatial_dims", 2)
    feats = enc(torch.zeros(2, 1, *(16,) * dims))
    for f, stage in zip(feats, enc.spec.stages):
        assert f.shape[1] == stage.channels and tuple(f.shape[2:]) == (16 // stage.stride,) * dims
    if params.get("act") == "leaky_relu":
        assert any(isinstance(m, torch.nn.LeakyReLU) for m in enc.modules())
        assert enc.spec.params["downsample"] == "conv" and "down.0.weight" in enc.state_dict()
    from warmstart.encoders import encoder_from_spec

    assert encoder_from_spec(enc.spec).state_dict().keys() == enc.state_dict().keys()
