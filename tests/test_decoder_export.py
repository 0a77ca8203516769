"""Whole-U-Net export: the decoder travels with the encoder and lands where a network matches it exactly.

Checked against real clients: segmentation_models_pytorch's Unet (its decoder must compute what
ours computes, feature for feature) and MONAI's BasicUNet (no matching decoder: encoder only).
"""
from __future__ import annotations

import pytest

torch = pytest.importorskip("torch")

from conftest import tiny_corpus  # noqa: E402

import warmstart as ws  # noqa: E402
from warmstart.errors import ExportError, WeightsMismatchError  # noqa: E402
from warmstart.pretrain.loop import pretrain  # noqa: E402
from warmstart.pretrain.settings import PretrainSettings  # noqa: E402

QUICK = dict(batch_size=8, max_steps=2, num_workers=0, precision="32-true", accelerator="cpu", checkpoint_every=1)


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    return tiny_corpus(tmp_path_factory.mktemp("dec"), n=2, shape=(8, 64, 64), sampling=dict(patch_size=32, stride=16))


def _run(corpus, root, name, encoder, method, **params):
    out = root / name
    pretrain(corpus, out, PretrainSettings(encoder=encoder, encoder_params=params.pop("encoder_params", {}),
                                           method=method, method_params=params, **QUICK), progress=False)
    return out


@pytest.fixture(scope="module")
def files(corpus, tmp_path_factory):
    root = tmp_path_factory.mktemp("files")
    out = {}
    run = _run(corpus, root, "restore-unet", "unet", "restore", encoder_params={"base_width": 8, "depth": 5})
    out["unet"] = ws.export_encoder(run, root / "unet.safetensors", with_decoder=True)[0]
    out["unet-enc"] = ws.export_encoder(run, root / "unet-enc.safetensors")[0]
    run = _run(corpus, root, "restore-r18", "resnet18", "restore")
    out["resnet18"] = ws.export_encoder(run, root / "r18.safetensors", with_decoder=True)[0]
    out["simclr"] = _run(corpus, root, "simclr", "unet", "simclr", encoder_params={"base_width": 4, "depth": 3})
    out["combined"] = _run(corpus, root, "combined", "unet", "combined", contrastive="moco_v2",
                           contrastive_params={"queue_size": 16}, encoder_params={"base_width": 4, "depth": 3})
    out["root"] = root
    return out


def test_manifest_says_which_parts_the_file_holds(files):
    m, e = ws.read_manifest(files["unet"]), ws.read_manifest(files["unet-enc"])
    assert m["parts"] == ["encoder", "decoder"] and e["parts"] == ["encoder"] and e["decoder"] is None
    assert m["decoder"]["norm"] == "batch" and m["decoder"]["out_channels"] == 8
    assert m["tensors"]["count"] == e["tensors"]["count"] + m["decoder"]["tensors"]
    assert ws.load_encoder(files["unet"]).spec == ws.load_encoder(files["unet-enc"]).spec  # decoder ignored there
    from warmstart.export.card import summary_text

    assert "decoder     U-Net decoder (batch norm" in summary_text(m) and "decoder     none" in summary_text(e)


def test_our_unet_gets_encoder_and_decoder_from_the_run(files):
    ckpt = torch.load(files["root"] / "restore-unet" / "checkpoints" / "last.ckpt", map_location="cpu", weights_only=True)
    net = ws.UNet.from_file(files["unet"], classes=3)
    rep = net.warm_start_report
    assert rep.complete and rep.decoder and rep.decoder_note.startswith("loaded")
    assert rep.untouched == 2  # only the head (weight, bias) starts random
    for k, v in net.decoder.state_dict().items():
        assert torch.equal(v, ckpt["state_dict"][f"method.decoder.{k}"]), k
    enc_only = ws.UNet.from_file(files["unet-enc"], classes=3).warm_start_report
    assert not enc_only.decoder and enc_only.decoder_note == ""
    skipped = ws.UNet.from_file(files["unet"], classes=3, decoder=False).warm_start_report
    assert not skipped.decoder and "decoder=False" in skipped.decoder_note
    other_norm = ws.UNet.from_file(files["unet"], classes=3, decoder_norm="group").warm_start_report
    assert not other_norm.decoder and "differs" in other_norm.decoder_note and other_norm.complete


def test_smp_unet_with_matching_widths_and_bilinear_upsampling_takes_the_decoder(files):
    smp = pytest.importorskip("segmentation_models_pytorch")
    model = smp.Unet("resnet18", encoder_weights=None, in_channels=1, classes=2, decoder_channels=(256, 128, 64, 64, 32),
                     decoder_interpolation="bilinear")
    rep = ws.warm_start(model, files["resnet18"], decoder=True)
    assert rep.layout == "smp" and rep.complete and len(rep.decoder) == ws.read_manifest(files["resnet18"])["decoder"]["tensors"]
    ours = ws.UNet.from_file(files["resnet18"], classes=2)
    model.eval()
    ours.eval()
    x = torch.randn(2, 1, 64, 64, generator=torch.Generator().manual_seed(0))
    with torch.no_grad():
        theirs = model.decoder(model.encoder(x))
        mine = ours.decoder(ours.encoder(x), (64, 64))
    assert theirs.shape == mine.shape and torch.allclose(theirs, mine, atol=1e-5)  # feature for feature
    # The same keys with nearest-neighbour upsampling compute something else: encoder only, and why.
    nearest = smp.Unet("resnet18", encoder_weights=None, in_channels=1, classes=2, decoder_channels=(256, 128, 64, 64, 32))
    rep = ws.warm_start(nearest, files["resnet18"])
    assert rep.complete and not rep.decoder and "decoder_interpolation='bilinear'" in rep.decoder_note
    with pytest.raises(WeightsMismatchError, match="decoder=True"):
        ws.warm_start(nearest, files["resnet18"], decoder=True)
    default = smp.Unet("resnet18", encoder_weights=None, in_channels=1, classes=2, decoder_interpolation="bilinear")
    note = ws.warm_start(default, files["resnet18"]).decoder_note  # smp default widths (256, 128, 64, 32, 16)
    assert "differs" in note and "decoder.blocks.3.conv1.0.weight ours (64, 128, 3, 3) theirs (32, 128, 3, 3)" in note


def test_monai_basicunet_takes_the_encoder_alone_and_says_so(files):
    monai = pytest.importorskip("monai")
    model = monai.networks.nets.BasicUNet(spatial_dims=2, in_channels=1, out_channels=2, features=(8, 16, 32, 64, 128, 8),
                                          act="relu", norm="batch")
    rep = ws.warm_start(model, files["unet"])
    assert rep.layout == "monai-basicunet" and rep.complete and not rep.decoder
    assert "has no place for warmstart's U-Net decoder" in rep.decoder_note and "decoder:" in str(rep)


def test_export_refuses_a_decoder_the_method_never_trained(files, tmp_path):
    with pytest.raises(ExportError, match="trains no decoder"):
        ws.export_encoder(files["simclr"], tmp_path / "x.safetensors", with_decoder=True)
    path, m = ws.export_encoder(files["simclr"], tmp_path / "x.safetensors")
    with pytest.raises(WeightsMismatchError, match="holds no decoder"):
        ws.warm_start(ws.UNet(m["encoder"]["spec"], 2), path, decoder=True)


def test_combined_exports_the_momentum_encoder_and_the_decoder(files, tmp_path):
    ckpt = torch.load(files["combined"] / "checkpoints" / "last.ckpt", map_location="cpu", weights_only=True)["state_dict"]
    path, m = ws.export_encoder(files["combined"], tmp_path / "c.safetensors", with_decoder=True)
    assert m["encoder"]["weights"] == "momentum" and m["parts"] == ["encoder", "decoder"]
    enc = ws.load_encoder(path)
    for k, v in enc.state_dict().items():
        assert torch.equal(v, ckpt[f"method.contrastive.encoder_momentum.{k}"]), k
    net = ws.UNet.from_file(path, classes=2)
    for k, v in net.decoder.state_dict().items():
        assert torch.equal(v, ckpt[f"method.restore.decoder.{k}"]), k
