"""Masked image modelling of the U-Net in 2-D and 3-D: the mask bookkeeping and the loss."""
from __future__ import annotations

import json

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from warmstart.encoders import build_encoder  # noqa: E402
from warmstart.pretrain.methods import build_method  # noqa: E402
from warmstart.pretrain.methods.masked import block_mask  # noqa: E402

SHAPES = [(4, 1, 32, 32), (2, 1, 16, 16, 16)]


def _method(dims: int, **kw):
    torch.manual_seed(0)
    enc = build_encoder("unet", in_channels=1, base_width=4, depth=3, **({"spatial_dims": 3} if dims == 3 else {}))
    return build_method("masked", enc, **kw)


def test_block_mask_hides_exactly_the_ratio_of_blocks():
    m = block_mask(5, (32, 32, 32), 4, 0.6, torch.Generator().manual_seed(0), torch.device("cpu"))
    assert m.shape == (5, 1, 8, 8, 8)
    assert m.flatten(1).sum(1).tolist() == [round(0.6 * 512)] * 5
    assert not torch.equal(m[0], m[1])  # per sample


@pytest.mark.parametrize("shape", SHAPES)
def test_hidden_blocks_stay_zero_after_every_stage(shape):
    m = _method(len(shape) - 2)
    x = torch.randn(shape)
    _, parts = m.masked_loss(x, torch.Generator().manual_seed(1))
    hidden = parts["hidden"]
    assert 0.5 < float(hidden.mean()) < 0.7 and m.block == 4
    for f in parts["features"]:  # each stage map is zero wherever its cell is hidden
        h = torch.nn.functional.interpolate(hidden, size=tuple(f.shape[2:]), mode="nearest")
        f = f.detach()
        assert float((f * h).abs().max()) == 0.0
        assert float((f * (1 - h)).abs().max()) > 0.0  # and not zero everywhere
    # hidden voxels carry no information: changing them changes no stage map
    x2 = torch.where(hidden.bool(), torch.randn(shape) * 10, x)
    _, parts2 = m.masked_loss(x2, torch.Generator().manual_seed(1))
    for a, b in zip(parts["features"], parts2["features"]):
        assert torch.equal(a, b)


@pytest.mark.parametrize("shape", SHAPES)
def test_the_loss_is_the_mean_squared_error_over_hidden_voxels_only(shape):
    m = _method(len(shape) - 2)
    x = torch.randn(shape)
    loss, parts = m.masked_loss(x, torch.Generator().manual_seed(2))
    r, h = parts["restored"].detach().numpy(), parts["hidden"].expand(shape).numpy().astype(bool)
    by_hand = float(np.mean((r[h] - x.numpy()[h]) ** 2))
    assert float(loss.detach()) == pytest.approx(by_hand, rel=1e-5)
    loss.backward()  # the tokens and the decoder learn
    assert m.tokens[0].grad is not None and m.decoder.blocks[0].conv1.weight.grad is not None


def test_masked_modelling_refuses_other_encoders_and_odd_patches():
    with pytest.raises(ValueError, match="U-Net encoder"):
        build_method("masked", build_encoder("resnet_narrow", in_channels=1, base_width=8))
    m = _method(2)
    with pytest.raises(ValueError, match="divisible by the encoder's deepest stride 4"):
        m.masked_loss(torch.randn(2, 1, 30, 30), torch.Generator())


@pytest.mark.parametrize("dims", [2, 3])
def test_masked_pretraining_runs_and_records_its_decoder(tmp_path, dims):
    from conftest import textured, tiny_corpus

    from warmstart.corpus.build import build_corpus
    from warmstart.corpus.settings import CorpusSettings, SamplingSettings
    from warmstart.pretrain.loop import pretrain
    from warmstart.pretrain.settings import PretrainSettings

    if dims == 2:
        corpus = tiny_corpus(tmp_path / "c", n=1)
    else:
        (tmp_path / "a").mkdir()
        np.save(tmp_path / "a" / "v.npy", textured(shape=(16, 48, 48), seed=0))
        corpus = build_corpus(tmp_path / "a", tmp_path / "c.zarr", CorpusSettings(
            sampling=SamplingSettings(spatial_dims=3, patch_size=16, assume_cubic_voxels=True)), report=False,
            progress=False).path
    s = PretrainSettings(encoder="unet", encoder_params={"base_width": 4, "depth": 3}, method="masked", batch_size=8,
                         max_steps=3, num_workers=0, precision="32-true", accelerator="cpu", deterministic=True)
    res = pretrain(corpus, tmp_path / "run", s, progress=False)
    assert res.steps == 3 and np.isfinite(res.final_loss)
    networks = json.loads((res.path / "networks.json").read_text())
    assert networks["decoder"]["key_prefix"] == "method.decoder."
    if dims == 2:  # encoder and decoder leave in one file; the reference U-Net takes both
        from warmstart.export.pack import export_encoder
        from warmstart.unet import UNet

        path, _ = export_encoder(res.path, tmp_path / "e.safetensors", with_decoder=True)
        net = UNet.from_file(path, classes=3)
        rep = net.warm_start_report
        assert rep.applied and not rep.missing and len(rep.decoder) == len(net.decoder.state_dict())
