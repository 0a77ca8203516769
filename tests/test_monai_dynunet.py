"""MONAI's DynUNet: its contracting path pretrained here (2-D and 3-D), loaded into a DynUNet that
MONAI builds.

Reference: MONAI's ``DynUNet`` (``monai.networks.nets``); the encoder path's outputs are compared
with the network's own ``input_block`` -> ``downsamples`` -> ``bottleneck`` modules.
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest

torch = pytest.importorskip("torch")
monai_nets = pytest.importorskip("monai.networks.nets")

import warmstart as ws  # noqa: E402
from conftest import textured  # noqa: E402
from warmstart.corpus.build import build_corpus  # noqa: E402
from warmstart.corpus.settings import CorpusSettings, SamplingSettings  # noqa: E402
from warmstart.encoders import build_encoder  # noqa: E402
from warmstart.errors import WeightsMismatchError  # noqa: E402
from warmstart.pretrain.loop import pretrain  # noqa: E402
from warmstart.pretrain.settings import PretrainSettings  # noqa: E402

ARGS = dict(filters=[4, 8, 16, 32], strides=[1, 2, 2, 2])


def _dynunet(dims: int, filters=ARGS["filters"]):
    strides = ARGS["strides"]
    return monai_nets.DynUNet(spatial_dims=dims, in_channels=1, out_channels=3, kernel_size=[3] * len(filters),
                              strides=strides, upsample_kernel_size=strides[1:], filters=filters)


def _their_path(net, x):
    feats = [net.input_block(x)]
    for d in net.downsamples:
        feats.append(d(feats[-1]))
    feats.append(net.bottleneck(feats[-1]))
    return feats


@pytest.mark.parametrize("dims", [2, 3])
def test_the_encoder_holds_dynunets_own_modules_under_its_keys(dims):
    enc = build_encoder("monai_dynunet", in_channels=1, spatial_dims=dims, **ARGS)
    theirs = _dynunet(dims).state_dict()
    ours = enc.state_dict()
    assert set(ours) == {k for k in theirs if k.startswith(("input_block.", "downsamples.", "bottleneck."))}
    assert all(tuple(v.shape) == tuple(theirs[k].shape) for k, v in ours.items())
    assert type(enc.input_block).__module__.startswith("monai.")
    assert [(s.channels, s.stride) for s in enc.spec.stages] == [(4, 1), (8, 2), (16, 4), (32, 8)]
    assert enc.spec.params.get("spatial_dims", 2) == dims


def test_uneven_strides_are_refused():
    with pytest.raises(ValueError, match="unevenly"):
        build_encoder("monai_dynunet", spatial_dims=3, filters=[4, 8, 16], strides=[1, [1, 2, 2], 2])


@pytest.fixture(scope="module", params=[2, 3])
def exported(request, tmp_path_factory):
    dims = request.param
    root = tmp_path_factory.mktemp(f"dyn{dims}")
    (root / "a").mkdir()
    for i in range(2):
        np.save(root / "a" / f"v{i}.npy", textured(shape=(16, 48, 48), seed=i))
    sampling = dict(spatial_dims=3, patch_size=16, assume_cubic_voxels=True) if dims == 3 else \
        dict(patch_size=32, stride=16, slice_stride=4)
    corpus = build_corpus(root / "a", root / "c.zarr", CorpusSettings(sampling=SamplingSettings(**sampling)),
                          report=False, progress=False).path
    s = PretrainSettings(encoder="monai_dynunet", encoder_params=dict(ARGS), method="simclr", batch_size=8, max_steps=2,
                         num_workers=0, precision="32-true", accelerator="cpu", deterministic=True, checkpoint_every=50)
    pretrain(corpus, root / "run", s, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        path, manifest = ws.export_encoder(root / "run", root / "dyn.safetensors")
    return dims, path, manifest


def test_monais_dynunet_takes_the_file_and_computes_our_features(exported):
    dims, path, manifest = exported
    assert manifest["input"]["spatial_dims"] == dims
    net = _dynunet(dims)
    rep = ws.warm_start(net, path)
    assert rep.layout == "monai-dynunet" and rep.complete
    x = torch.randn((2, 1) + (16,) * dims, generator=torch.Generator().manual_seed(0))
    net.eval()
    enc = ws.load_encoder(path).eval()
    with torch.no_grad():
        for a, b in zip(_their_path(net, x), enc(x), strict=True):
            torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-5)
        assert tuple(net(x).shape) == (2, 3) + (16,) * dims  # the whole network still runs


def test_other_widths_or_dims_are_refused_by_name(exported):
    dims, path, _ = exported
    with pytest.raises(WeightsMismatchError, match=r"shape mismatches: input_block\.conv1\.conv\.weight"):
        ws.warm_start(_dynunet(dims, filters=[8, 16, 32, 64]), path)
    with pytest.raises(WeightsMismatchError, match=f"holds a {dims}-D encoder"):
        ws.warm_start(_dynunet(5 - dims), path)
