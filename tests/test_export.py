"""Export, loading and warm start, checked against the real downstream libraries.

For every layout: the downstream network (segmentation_models_pytorch, MONAI, timm, torchvision,
our reference U-Net) is built with random weights, warm-started from an exported file, and its
encoder's feature maps must equal those of our encoder on the same input.
"""
from __future__ import annotations

import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch

import warmstart as ws
from warmstart.errors import DataMismatchWarning, ExportError, WeightsMismatchError
from warmstart.export.file import read_encoder_file, read_manifest, write_encoder_file
from warmstart.export.load import adapt_input_channels
from warmstart.pretrain.loop import pretrain
from warmstart.pretrain.settings import PretrainSettings

QUIET = dict(batch_size=16, num_workers=0, precision="32-true", accelerator="cpu", max_steps=2, checkpoint_every=50)


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    from conftest import tiny_corpus

    return tiny_corpus(tmp_path_factory.mktemp("exp"))


_RUNS: dict = {}


def _exported(corpus, tmp_path_factory, encoder: str, method: str = "simclr", **params) -> Path:
    """Pretrain two steps (so batch-norm statistics differ from their initial values) and export."""
    key = (encoder, method, tuple(sorted(params.items())))
    if key not in _RUNS:
        root = tmp_path_factory.mktemp(f"run-{encoder}-{method}")
        pretrain(corpus, root / "run", PretrainSettings(encoder=encoder, encoder_params=params, method=method, **QUIET),
                 progress=False)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            path, _ = ws.export_encoder(root / "run", root / "enc.safetensors")
        _RUNS[key] = path
    return _RUNS[key]


@pytest.fixture(scope="module")
def r18(corpus, tmp_path_factory):
    return _exported(corpus, tmp_path_factory, "resnet18")


@pytest.fixture(scope="module")
def unet8(corpus, tmp_path_factory):
    return _exported(corpus, tmp_path_factory, "unet", base_width=8, depth=5)


def _ours(file, x):
    enc = ws.load_encoder(file).eval()
    with torch.no_grad():
        return enc(x)


def _same(a, b):
    assert len(a) == len(b)
    for u, v in zip(a, b):
        assert u.shape == v.shape
        torch.testing.assert_close(u, v, rtol=1e-5, atol=1e-5)


# ------------------------------------------------------------------------------------------ export


def test_manifest_records_the_input_contract(corpus, r18):
    m = read_manifest(r18)
    cm = json.loads((Path(corpus) / "manifest.json").read_text())
    assert m["encoder"]["spec"]["name"] == "resnet18" and m["encoder"]["first_conv"] == "conv1"
    assert m["encoder"]["weights"] == "online"  # SimCLR has no momentum copy
    # The standardization is the corpus's (what the run fed the encoder).
    assert m["standardization"]["mean"] == pytest.approx(cm["statistics"]["mean"])
    assert m["standardization"]["std"] == pytest.approx(cm["statistics"]["std"])
    assert m["intensity"]["fit"] == "per_volume" and m["intensity"]["rule"]["scheme"] == "percentile"
    assert m["input"] == {"channels": 1, "patch_size": 32, "axes": "Z", "spatial_dims": 2, "axis_order": "YX",
                          "patch_shape": [32, 32], "voxel_size_um": [None, None, None]}  # the channel count once
    # One convention for both manifests: format + format_version, and the same voxel fields.
    assert (m["format"], m["format_version"], cm["format"], cm["format_version"]) == (
        "warmstart-encoder", 2, "warmstart-corpus", 2)
    assert m["voxel_size_um"] == cm["voxel_size_um"]
    assert set(m["voxel_size_um"]) == {"source_range", "patch_range", "target", "unknown_sources"}
    # .npy sources carry no modality and the recipe named none: formats are not passed off as modalities.
    assert m["corpus"]["formats"] == {"npy": 3} and m["corpus"]["modalities"] == []
    assert m["corpus"]["modality_unrecorded"] == 3
    assert m["corpus"]["sources"] == 3 and len(m["corpus"]["provenance"]) == 3
    assert {p["sha256"] for p in m["corpus"]["provenance"]} == {s["sha256"] for s in cm["sources"]}
    assert m["training"]["steps"] == 2 and m["training"]["finished"] is True
    assert m["training"]["library_versions"]["torch"] == torch.__version__
    cfg = m["timm"]["pretrained_cfg"]
    assert cfg["input_size"] == [1, 32, 32] and cfg["first_conv"] == "conv1"
    assert cfg["mean"] == [m["standardization"]["mean"]]
    # Percentiles from the manifest histogram agree with the stored patches' own (to a bin width).
    vals = ws.open_corpus(corpus).read().ravel()
    for q in ("5", "50", "95"):
        assert m["corpus_values"]["percentiles"][q] == pytest.approx(np.percentile(vals, float(q)), abs=2 / 256)


def test_reading_a_manifest_needs_no_torch(r18):
    code = f"import sys, warmstart; warmstart.read_manifest({str(r18)!r}); print('torch' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "False"


def test_momentum_weights_are_exported_where_the_method_has_them(corpus, tmp_path):
    pretrain(corpus, tmp_path / "run", PretrainSettings(encoder="resnet_narrow", encoder_params={"base_width": 8},
                                                        method="moco_v2", **QUIET), progress=False)
    ck = torch.load(tmp_path / "run" / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    for choice, held, prefix in (("auto", "momentum", "method.encoder_momentum."),
                                 ("momentum", "momentum", "method.encoder_momentum."),
                                 ("online", "online", "method.encoder.")):
        path, m = ws.export_encoder(tmp_path / "run", tmp_path / f"{choice}.safetensors", weights=choice)
        assert m["encoder"]["weights"] == held
        _, arrays = read_encoder_file(path)
        w = prefix + "layer1.0.conv1.weight"
        np.testing.assert_array_equal(arrays["layer1.0.conv1.weight"], ck[w].numpy())
    # online and momentum copies differ after training steps
    a = read_encoder_file(tmp_path / "online.safetensors")[1]["conv1.weight"]
    b = read_encoder_file(tmp_path / "momentum.safetensors")[1]["conv1.weight"]
    assert not np.array_equal(a, b)


def test_simclr_has_no_momentum_copy_and_a_non_run_is_refused(corpus, tmp_path, r18):
    run = r18.parent / "run"
    with pytest.raises(ExportError, match="no momentum copy"):
        ws.export_encoder(run, tmp_path / "x.safetensors", weights="momentum")
    with pytest.raises(ExportError, match="no checkpoint"):
        ws.export_encoder(tmp_path, tmp_path / "x.safetensors")
    assert not (tmp_path / "x.safetensors").exists()


def test_a_run_made_before_networks_json_is_exported_by_the_cli(corpus, tmp_path):
    # export/ reads which checkpoint entries are the encoder from the run folder; for a run that
    # predates that record the command writes it first (from the checkpoint's own settings).
    from warmstart.cli import main

    run = tmp_path / "run"
    pretrain(corpus, run, PretrainSettings(encoder="resnet_narrow", encoder_params={"base_width": 8}, method="byol",
                                           **QUIET), progress=False)
    expected = json.loads((run / "networks.json").read_text())
    (run / "networks.json").unlink()
    with pytest.raises(ExportError, match="networks.json: missing"):
        ws.export_encoder(run, tmp_path / "lib.safetensors")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["-q", "export", str(run), "-o", str(tmp_path / "cli.safetensors")]) == 0
    assert json.loads((run / "networks.json").read_text()) == expected
    ck = torch.load(run / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    _, arrays = read_encoder_file(tmp_path / "cli.safetensors")
    np.testing.assert_array_equal(arrays["conv1.weight"], ck["method.encoder_momentum.conv1.weight"].numpy())


def test_an_unfinished_run_is_exported_with_a_warning(corpus, tmp_path, r18):
    run = tmp_path / "run"
    import shutil

    shutil.copytree(r18.parent / "run", run)
    (run / "summary.json").unlink()  # what a killed run leaves
    with pytest.warns(UserWarning, match="stopped at step 2"):
        _, m = ws.export_encoder(run, tmp_path / "e.safetensors")
    assert m["training"]["finished"] is False


# ------------------------------------------------------------------------------------ load / refuse


def test_load_encoder_reproduces_the_trained_encoder(r18):
    run = r18.parent / "run"
    ck = torch.load(run / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    enc = ws.load_encoder(r18)
    for k, v in enc.state_dict().items():
        torch.testing.assert_close(v, ck["method.encoder." + k], rtol=0, atol=0)
    assert enc.manifest["encoder"]["spec"] == enc.spec.to_dict()


def _tensor_data_offset(path: Path) -> int:
    # safetensors layout (the format's specification): 8-byte little-endian header length, JSON header, data.
    return 8 + int.from_bytes(path.read_bytes()[:8], "little")


def test_a_file_with_one_byte_flipped_in_a_tensor_is_refused(r18, tmp_path):
    bad = tmp_path / "bad.safetensors"
    data = bytearray(r18.read_bytes())
    data[_tensor_data_offset(r18) + 1000] ^= 0x01
    bad.write_bytes(bytes(data))
    with pytest.raises(ExportError, match="damaged or altered"):
        ws.load_encoder(bad)
    with pytest.raises(ExportError, match="damaged or altered"):
        ws.warm_start(ws.UNet("resnet18"), bad)
    from warmstart.cli import main

    assert main(["inspect", str(bad), "--verify"]) == 1


def test_a_version_1_encoder_file_is_still_read(r18, tmp_path):
    # The layout written by warmstart 0.1.0 before the manifest conventions were unified.
    manifest, arrays = read_encoder_file(r18)
    v1 = {k: v for k, v in manifest.items() if k != "format_version"}
    v1.update(version=1, input={**manifest["input"], "slices_per_patch": manifest["input"]["channels"]},
              corpus={**manifest["corpus"], "modalities": ["npy"]},
              voxel_size_um={k: v for k, v in manifest["voxel_size_um"].items() if k != "target"})
    del v1["corpus"]["modality_unrecorded"]
    write_encoder_file(tmp_path / "v1.safetensors", arrays, v1)
    m = read_manifest(tmp_path / "v1.safetensors")
    assert m["format_version"] == 2 and "version" not in m and m["input"] == manifest["input"]
    assert m["corpus"]["modalities"] == [] and m["voxel_size_um"]["target"] is None
    x = torch.randn(1, 1, 32, 32)
    _same(_ours(tmp_path / "v1.safetensors", x), _ours(r18, x))


def test_unknown_version_missing_and_misshapen_tensors_are_refused(r18, tmp_path):
    manifest, arrays = read_encoder_file(r18)
    newer = dict(manifest, format_version=99)
    write_encoder_file(tmp_path / "v99.safetensors", arrays, newer)
    with pytest.raises(ExportError, match="version 99 is unknown"):
        ws.load_encoder(tmp_path / "v99.safetensors")
    fewer = {k: v for k, v in arrays.items() if k != "layer4.1.conv2.weight"}
    write_encoder_file(tmp_path / "fewer.safetensors", fewer, manifest)
    with pytest.raises(ExportError, match="missing tensors: layer4.1.conv2.weight"):
        ws.load_encoder(tmp_path / "fewer.safetensors")
    bent = dict(arrays, **{"layer1.0.conv1.weight": np.zeros((64, 64, 1, 1), np.float32)})
    write_encoder_file(tmp_path / "bent.safetensors", bent, manifest)
    with pytest.raises(ExportError, match=r"wrong shapes: layer1.0.conv1.weight \(64, 64, 1, 1\)"):
        ws.load_encoder(tmp_path / "bent.safetensors")
    (tmp_path / "junk.safetensors").write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all")
    with pytest.raises(ExportError, match="not a readable safetensors"):
        read_manifest(tmp_path / "junk.safetensors")


# ------------------------------------------------------------------------------ warm start, layouts


def _smp(arch):
    import segmentation_models_pytorch as smp

    return getattr(smp, arch)("resnet18", encoder_weights=None, in_channels=1, classes=3)


@pytest.mark.parametrize("arch", ["Unet", "UnetPlusPlus", "FPN"])
def test_segmentation_models_pytorch_encoder_computes_our_features(r18, arch):
    # segmentation_models_pytorch: the encoder returns [input, stride 2, 4, 8, 16, 32].
    net = _smp(arch)
    rep = ws.warm_start(net, r18)
    assert rep.layout == "smp" and rep.complete and len(rep.loaded) == 120
    x = torch.randn(2, 1, 64, 64)
    with torch.no_grad():
        _same(net.eval().encoder(x)[1:], _ours(r18, x))


def test_timm_features_only_resnet_computes_our_features(r18):
    import timm

    net = timm.create_model("resnet18", pretrained=False, features_only=True, in_chans=1)
    rep = ws.warm_start(net, r18)
    assert rep.layout == "timm" and rep.complete
    x = torch.randn(2, 1, 64, 64)
    with torch.no_grad():
        _same(net.eval()(x), _ours(r18, x))


def test_torchvision_resnet_with_an_rgb_stem_gets_adapted_weights(r18):
    # torchvision's resnet18 takes 3 channels: a gray image repeated on them must give our features.
    import torchvision

    net = torchvision.models.resnet18(num_classes=5)
    rep = ws.warm_start(net, r18)
    assert rep.layout == "torchvision" and rep.adapted == ["conv1.weight 1 -> 3 channels"] and rep.untouched == 2
    x = torch.randn(2, 1, 64, 64)
    net.eval()
    with torch.no_grad():
        h = net.relu(net.bn1(net.conv1(x.repeat(1, 3, 1, 1))))
        feats = [h]
        h = net.maxpool(h)
        for layer in (net.layer1, net.layer2, net.layer3, net.layer4):
            h = layer(h)
            feats.append(h)
    _same(feats, _ours(r18, x))


def test_our_reference_unet_and_bare_encoder(r18, unet8):
    for f in (r18, unet8):
        net = ws.UNet.from_file(f, classes=2)
        assert net.warm_start_report.layout == "warmstart" and net.warm_start_report.complete
        x = torch.randn(1, 1, 64, 64)
        with torch.no_grad():
            _same(net.eval().encoder(x), _ours(f, x))
            assert net(x).shape == (1, 2, 64, 64)
        bare = ws.load_encoder(f)
        torch.nn.init.zeros_(next(bare.parameters()))
        assert ws.warm_start(bare, f).layout == "encoder"


def test_monai_flexibleunet_resnet50(corpus, tmp_path_factory):
    from monai.networks.nets import FlexibleUNet

    f = _exported(corpus, tmp_path_factory, "resnet50")
    net = FlexibleUNet(in_channels=1, out_channels=2, backbone="resnet50", spatial_dims=2, pretrained=False)
    rep = ws.warm_start(net, f)
    assert rep.layout == "monai-flexibleunet" and rep.complete
    x = torch.randn(1, 1, 64, 64)
    with torch.no_grad():
        _same(net.eval().encoder(x), _ours(f, x))


def test_monai_flexibleunet_resnet18_is_refused_with_the_reason(r18):
    from monai.networks.nets import FlexibleUNet

    net = FlexibleUNet(in_channels=1, out_channels=2, backbone="resnet18", spatial_dims=2, pretrained=False)
    before = {k: v.clone() for k, v in net.state_dict().items()}
    with pytest.raises(WeightsMismatchError, match="type A"):
        ws.warm_start(net, r18)
    assert all(torch.equal(before[k], v) for k, v in net.state_dict().items())  # nothing copied
    rep = ws.warm_start(net, r18, strict=False)
    assert rep.applied and any("downsample" in k for k in rep.unexpected) and len(rep.loaded) == 102


def _basicunet(features, **kw):
    from monai.networks.nets import BasicUNet

    return BasicUNet(spatial_dims=2, in_channels=1, out_channels=2, features=features, act="relu", norm="batch", **kw)


def test_monai_basicunet_computes_our_features(unet8):
    net = _basicunet((8, 16, 32, 64, 128, 8))  # MONAI's default bias=True: zero biases are exact
    rep = ws.warm_start(net, unet8)
    assert rep.layout == "monai-basicunet" and rep.complete and len(rep.zero_filled) == 10
    x = torch.randn(2, 1, 64, 64)
    net.eval()
    with torch.no_grad():
        feats = [net.conv_0(x)]
        for down in (net.down_1, net.down_2, net.down_3, net.down_4):
            feats.append(down(feats[-1]))
    _same(feats, _ours(unet8, x))


def test_mismatched_depth_or_width_refused_under_strict_and_reported_otherwise(r18, unet8):
    import segmentation_models_pytorch as smp

    deeper = smp.Unet("resnet34", encoder_weights=None, in_channels=1, classes=2)  # more blocks per layer
    with pytest.raises(WeightsMismatchError, match="nothing in the file"):
        ws.warm_start(deeper, r18)
    rep = ws.warm_start(deeper, r18, strict=False)
    assert rep.applied and rep.missing and all(".layer" in k or "layer" in k for k in rep.missing)
    wider = _basicunet((16, 32, 64, 128, 256, 16))
    with pytest.raises(WeightsMismatchError, match="shape mismatches"):
        ws.warm_start(wider, unet8)
    rep = ws.warm_start(wider, unet8, strict=False)
    assert rep.mismatched and ("conv_0.conv_1.conv.weight", (8, 8, 3, 3), (16, 16, 3, 3)) in rep.mismatched
    with pytest.raises(WeightsMismatchError, match="takes resnet/smp encoders, the file holds a unet encoder"):
        ws.warm_start(deeper, unet8, layout="smp")
    with pytest.raises(WeightsMismatchError, match="no layout places"):
        ws.warm_start(torch.nn.Linear(3, 4), r18)


@pytest.mark.parametrize("src,dst", [(1, 3), (3, 1), (1, 4), (3, 5), (3, 2)])
def test_input_channel_rule_matches_timm_and_smp(src, dst):
    # References: timm.models._manipulate.adapt_input_conv and segmentation_models_pytorch's
    # patch_first_conv, the two libraries whose rule we follow.
    from segmentation_models_pytorch.encoders._utils import patch_first_conv
    from timm.models._manipulate import adapt_input_conv

    import inspect

    w = torch.randn(8, src, 7, 7)
    ours = adapt_input_channels(w, dst)
    if "base_chans" in inspect.signature(adapt_input_conv).parameters:
        torch.testing.assert_close(ours, adapt_input_conv(dst, w.clone(), base_chans=src))
    elif src == 3:  # timm before 1.0.23 (which dynamic-network-architectures pins) assumes 3 source channels
        torch.testing.assert_close(ours, adapt_input_conv(dst, w.clone()))
    holder = torch.nn.Sequential(torch.nn.Conv2d(src, 8, 7, bias=False))
    holder[0].weight.data.copy_(w)
    patch_first_conv(holder, dst, default_in_channels=src, pretrained=True)
    torch.testing.assert_close(ours, holder[0].weight.data)
    # The defining property, where the rule keeps it (to one channel, or to a multiple of the
    # channels): an image repeated over the channels gives the same response.
    if dst == 1 or dst % src == 0:
        x = torch.randn(1, 1, 16, 16)
        a = torch.nn.functional.conv2d(x.repeat(1, src, 1, 1), w)
        b = torch.nn.functional.conv2d(x.repeat(1, dst, 1, 1), ours)
        torch.testing.assert_close(a, b, rtol=1e-4, atol=1e-4)


# ------------------------------------------------------------------------------------------ prepare


def test_prepare_applies_the_rule_and_standardization(r18):
    from conftest import textured

    from warmstart.intensity import IntensitySettings, fit_intensity

    m = read_manifest(r18)
    vol = textured(shape=(8, 64, 64), seed=5)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DataMismatchWarning)  # corpus-like data: no warning
        out = ws.prepare(vol, r18)
    ref = fit_intensity(vol, IntensitySettings())  # the corpus's rule: default percentiles
    expect = (ref.apply(vol) - m["standardization"]["mean"]) / m["standardization"]["std"]
    np.testing.assert_allclose(out, expect, rtol=1e-6)
    assert out.dtype == np.float32


def test_prepare_warns_with_the_numbers_when_data_is_unlike_the_corpus(r18):
    from conftest import textured

    # Mostly dark with a few bright grains: after the percentile rule its median sits far from the corpus's.
    vol = textured(shape=(8, 64, 64), seed=1).astype(np.float32)
    vol[:, :, 8:] = vol.min()
    with pytest.warns(DataMismatchWarning, match=r"1/50/99th percentiles are .* the corpus's 0\.0"):
        ws.prepare(vol, r18)
    m = dict(read_manifest(r18))
    m["voxel_size_um"] = dict(m["voxel_size_um"], patch_range=[0.8, 1.2])
    with pytest.warns(DataMismatchWarning, match=r"voxel size 5 µm is outside .* 0\.8-1\.2 µm"):
        ws.prepare(textured(shape=(4, 64, 64), seed=0), m, voxel_size_um=(5.0, 5.0, 5.0))


def test_prepare_with_a_fixed_physical_scale_uses_the_recorded_reference(r18):
    # A fixed Hounsfield window (-1000, 1000) -> (0, 1), clipped: common practice for CT.
    from warmstart.intensity import IntensitySettings, fit_intensity

    ref = fit_intensity(np.zeros((2, 4, 4)) + 5, IntensitySettings(scheme="fixed", window=(-1000, 1000), unit="HU"))
    m = dict(read_manifest(r18))
    m["intensity"] = {"rule": ref.settings, "fit": "fixed", "reference": {k: v for k, v in ref.to_dict().items() if k != "stats"}}
    m["standardization"] = {"mean": 0.5, "std": 0.25}
    hu = np.array([[-2000.0, -1000.0, 0.0, 500.0, 3000.0]])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataMismatchWarning)
        out = ws.prepare(hu, m)
    np.testing.assert_allclose(out, (np.array([[0, 0, 0.5, 0.75, 1.0]]) - 0.5) / 0.25)


# -------------------------------------------------------------------------------------------- CLI


def test_cli_export_inspect_and_model_card(r18, tmp_path, capsys):
    from warmstart.cli import main

    out = tmp_path / "e.safetensors"
    assert main(["-q", "export", str(r18.parent / "run"), "-o", str(out)]) == 0
    text = capsys.readouterr().out
    assert "resnet18" in text and "percentiles 0.5 / 99.5" in text
    assert main(["inspect", str(out), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["tensors"]["count"] == 120
    card = tmp_path / "cards" / "card.md"  # into a folder that does not exist yet
    assert main(["inspect", str(out), "--card", str(card), "--verify"]) == 0
    assert "verified" in capsys.readouterr().out
    md = card.read_text()
    assert "## Intended use" in md and "not for diagnosis" in md and read_manifest(out)["tensors"]["sha256"] in md
    # Formats are called formats; an unrecorded modality is said to be unrecorded, not filled with formats.
    assert "file formats: npy: 3" in md and "modalities: not recorded" in md


def test_timm_builds_a_model_from_the_manifest_configuration(r18):
    # timm's own resolver (timm.data.resolve_data_config) must read input size, mean and std from it.
    import timm
    from timm.data import resolve_data_config

    cfg = read_manifest(r18)["timm"]
    model = timm.create_model(cfg["architecture"], pretrained=False, in_chans=1, num_classes=0,
                              pretrained_cfg_overlay=cfg["pretrained_cfg"])
    data = resolve_data_config({}, model=model)
    assert tuple(data["input_size"]) == (1, 32, 32)
    assert data["mean"] == pytest.approx(tuple(cfg["pretrained_cfg"]["mean"]))
    assert data["std"] == pytest.approx(tuple(cfg["pretrained_cfg"]["std"]))
    assert ws.warm_start(model, r18).complete


def test_monai_unet_with_residual_units_is_refused(unet8):
    from monai.networks.nets import UNet as MonaiUNet

    net = MonaiUNet(spatial_dims=2, in_channels=1, out_channels=2, channels=(8, 16, 32, 64, 128), strides=(2, 2, 2, 2))
    with pytest.raises(WeightsMismatchError, match="no layout places"):
        ws.warm_start(net, unet8)
