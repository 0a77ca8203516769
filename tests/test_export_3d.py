"""3-D export and warm start: a cube run leaves as one file that our 3-D U-Net and MONAI's 3-D
BasicUNet load, whose manifest says it is 3-D, and that 2-D networks refuse by name.

References: MONAI's ``BasicUNet`` (spatial_dims=3) built by MONAI itself; torch's ``conv3d`` for
the input-channel rule's defining property.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest

torch = pytest.importorskip("torch")

import warmstart as ws  # noqa: E402
from conftest import textured  # noqa: E402
from warmstart.corpus.build import build_corpus  # noqa: E402
from warmstart.corpus.settings import CorpusSettings, ReadSettings, SamplingSettings  # noqa: E402
from warmstart.errors import DataMismatchWarning, WeightsMismatchError  # noqa: E402
from warmstart.export.load import adapt_input_channels  # noqa: E402
from warmstart.pretrain.loop import pretrain  # noqa: E402
from warmstart.pretrain.settings import PretrainSettings  # noqa: E402

WIDTHS = (4, 8, 16, 32, 64)  # unet base_width 4, depth 5: BasicUNet's features[:5]


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    """A masked-modelling run on cubes of a FIB-SEM-like stack (2 µm sections, 1 µm pixels, so the
    cubes have 2 µm voxels), exported with its decoder."""
    root = tmp_path_factory.mktemp("e3d")
    (root / "a").mkdir()
    for i in range(2):
        np.save(root / "a" / f"v{i}.npy", textured(shape=(32, 64, 64), seed=i))
    corpus = build_corpus(root / "a", root / "c.zarr", CorpusSettings(
        read=ReadSettings(voxel_size_um=(2.0, 1.0, 1.0)),
        sampling=SamplingSettings(spatial_dims=3, patch_size=16)), report=False, progress=False).path
    s = PretrainSettings(encoder="unet", encoder_params={"base_width": 4, "depth": 5}, method="masked", batch_size=8,
                         max_steps=2, num_workers=0, precision="32-true", accelerator="cpu", deterministic=True,
                         checkpoint_every=50)
    run = pretrain(corpus, root / "run", s, progress=False).path
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        path, manifest = ws.export_encoder(run, root / "enc3d.safetensors", with_decoder=True)
    return run, path, manifest


def test_the_manifest_says_3d_with_axis_order_patch_shape_and_voxel_size_per_axis(exported):
    _, path, m = exported
    assert m["input"]["spatial_dims"] == 3 and m["input"]["axis_order"] == "ZYX"
    assert m["input"]["patch_shape"] == [16, 16, 16] and m["parts"] == ["encoder", "decoder"]
    assert m["input"]["voxel_size_um"] == [[2.0, 2.0], [2.0, 2.0], [2.0, 2.0]]
    assert m["timm"] is None  # timm's configurations describe 2-D images
    from warmstart.export.card import model_card, summary_text

    assert "3-D patches of 16x16x16 voxels (ZYX)" in summary_text(m)
    assert "3-D encoder: it takes volumes" in model_card(m)


def test_load_encoder_and_the_unet_rebuild_the_trained_3d_networks(exported):
    run, path, _ = exported
    state = torch.load(run / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    enc = ws.load_encoder(path)
    assert tuple(enc.levels[0].conv1.weight.shape) == (4, 1, 3, 3, 3)
    for k, v in enc.state_dict().items():
        torch.testing.assert_close(v, state[f"method.encoder.{k}"], rtol=0, atol=0)
    net = ws.UNet.from_file(path, classes=3)
    rep = net.warm_start_report
    assert rep.complete and len(rep.decoder) == len(net.decoder.state_dict())
    for k, v in net.decoder.state_dict().items():
        torch.testing.assert_close(v, state[f"method.decoder.{k}"], rtol=0, atol=0)
    assert tuple(net(torch.zeros(1, 1, 32, 32, 32)).shape) == (1, 3, 32, 32, 32)


def test_monai_3d_basicunet_computes_our_features(exported):
    from monai.networks.nets import BasicUNet

    _, path, _ = exported
    net = BasicUNet(spatial_dims=3, in_channels=1, out_channels=2, features=WIDTHS + (4,), act="relu", norm="batch")
    rep = ws.warm_start(net, path)
    assert rep.layout == "monai-basicunet" and rep.complete and rep.applied
    assert "not loaded" in rep.decoder_note  # MONAI's decoder is not ours: the encoder alone
    x = torch.randn(2, 1, 32, 32, 32, generator=torch.Generator().manual_seed(0))
    net.eval()
    enc = ws.load_encoder(path).eval()
    with torch.no_grad():
        feats = [net.conv_0(x)]
        for down in (net.down_1, net.down_2, net.down_3, net.down_4):
            feats.append(down(feats[-1]))
        ours = enc(x)
    assert len(feats) == len(ours)
    for a, b in zip(feats, ours):
        torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-5)


def test_a_2d_network_refuses_the_3d_file_by_name(exported):
    from monai.networks.nets import BasicUNet

    _, path, _ = exported
    flat = BasicUNet(spatial_dims=2, in_channels=1, out_channels=2, features=WIDTHS + (4,), act="relu", norm="batch")
    before = {k: v.clone() for k, v in flat.state_dict().items()}
    with pytest.raises(WeightsMismatchError, match=r"holds a 3-D encoder \(3x3x3 kernels.* BasicUNet is a 2-D network"):
        ws.warm_start(flat, path, strict=False)
    assert all(torch.equal(v, before[k]) for k, v in flat.state_dict().items())  # nothing copied
    with pytest.raises(WeightsMismatchError, match="3-D encoder"):
        ws.warm_start(ws.UNet("unet", classes=2, base_width=4, depth=5), path)


def test_a_3d_network_with_other_widths_is_refused_naming_the_first_mismatch(exported):
    from monai.networks.nets import BasicUNet

    _, path, _ = exported
    wider = BasicUNet(spatial_dims=3, in_channels=1, out_channels=2, features=(8, 16, 32, 64, 128, 8), act="relu",
                      norm="batch")
    with pytest.raises(WeightsMismatchError, match=r"shape mismatches: conv_0\.conv_0\.conv\.weight ours \(4, 1, 3, 3, 3\) "
                                                   r"theirs \(8, 1, 3, 3, 3\)"):
        ws.warm_start(wider, path)


def test_more_input_channels_adapt_the_3d_first_convolution(exported):
    _, path, _ = exported
    net = ws.UNet.from_file(path, classes=2, in_channels=2)
    rep = net.warm_start_report
    assert rep.adapted == ["encoder.levels.0.conv1.weight 1 -> 2 channels"]
    # The rule's defining property, checked with torch's conv3d: a volume repeated over the two
    # channels gives the same response as the single-channel original.
    w = ws.load_encoder(path).levels[0].conv1.weight.detach()
    x = torch.randn(1, 1, 8, 8, 8)
    a = torch.nn.functional.conv3d(x, w)
    b = torch.nn.functional.conv3d(x.repeat(1, 2, 1, 1, 1), adapt_input_channels(w, 2))
    torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-5)
    # and per depth plane it is the 2-D rule (the rule acts on the channel axis alone)
    w3 = torch.randn(4, 3, 3, 3, 3)
    for d in range(3):
        torch.testing.assert_close(adapt_input_channels(w3, 5)[:, :, d], adapt_input_channels(w3[:, :, d], 5))


def test_prepare_checks_a_3d_volume_axis_by_axis(exported):
    _, path, _ = exported
    vol = textured(shape=(16, 32, 32), seed=5)
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # cubic 2 µm voxels, like the corpus cubes: no warning
        out = ws.prepare(vol, path, voxel_size_um=(2.0, 2.0, 2.0))
    assert out.shape == vol.shape and out.dtype == np.float32
    with pytest.warns(DataMismatchWarning, match=r"voxel size along Z is 10 µm, the corpus cubes' 2-2 µm"):
        ws.prepare(vol, path, voxel_size_um=(10.0, 2.0, 2.0))
