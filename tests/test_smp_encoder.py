"""segmentation_models_pytorch's encoders pretrained here and loaded by smp's own networks.

Reference: segmentation_models_pytorch itself (``smp.encoders.get_encoder`` builds the encoder,
``smp.Unet`` / ``smp.FPN`` the networks the weights go into).
"""
from __future__ import annotations

import warnings

import pytest

torch = pytest.importorskip("torch")
smp = pytest.importorskip("segmentation_models_pytorch")

import warmstart as ws  # noqa: E402
from warmstart.encoders import build_encoder  # noqa: E402
from warmstart.errors import PretrainError, WeightsMismatchError  # noqa: E402
from warmstart.pretrain.loop import pretrain  # noqa: E402
from warmstart.pretrain.settings import PretrainSettings  # noqa: E402

QUICK = dict(batch_size=8, max_steps=2, num_workers=0, precision="32-true", accelerator="cpu", checkpoint_every=50,
             deterministic=True)


@pytest.mark.parametrize("name", ["resnet18", "efficientnet-b0", "tu-resnet10t"])
def test_the_encoder_is_smps_own_module_with_its_keys_and_stages(name):
    enc = build_encoder("smp", in_channels=1, encoder_name=name, depth=5)
    theirs = smp.encoders.get_encoder(name, in_channels=1, depth=5, weights=None)
    assert isinstance(enc, type(theirs))  # smp's class (forward leaves out the input map)
    assert {k: tuple(v.shape) for k, v in enc.state_dict().items()} == \
        {k: tuple(v.shape) for k, v in theirs.state_dict().items()}
    assert [s.channels for s in enc.spec.stages] == list(theirs.out_channels[1:])
    assert [s.stride for s in enc.spec.stages] == [2, 4, 8, 16, 32]
    feats = enc(torch.zeros(1, 1, 64, 64))
    assert [tuple(f.shape[1:]) for f in feats] == [(c, 64 // s, 64 // s) for c, s in
                                                   zip(theirs.out_channels[1:], (2, 4, 8, 16, 32))]
    assert enc.spec.params["library"]["name"] == "segmentation_models_pytorch"


def test_3d_and_encoders_with_empty_stages_are_refused():
    with pytest.raises(ValueError, match="2-D"):
        build_encoder("smp", encoder_name="resnet18", spatial_dims=3)
    with pytest.raises(ValueError, match="cannot build encoder 'no-such-net'"):
        build_encoder("smp", encoder_name="no-such-net")


@pytest.fixture(scope="module")
def exported(tmp_path_factory):
    from conftest import tiny_corpus

    root = tmp_path_factory.mktemp("smp")
    corpus = tiny_corpus(root, n=2, shape=(8, 64, 64), sampling=dict(patch_size=32, stride=16))
    s = PretrainSettings(encoder="smp", encoder_params={"encoder_name": "resnet18"}, method="dense",
                         method_params={"max_points": 32}, **QUICK)
    pretrain(corpus, root / "run", s, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        path, _ = ws.export_encoder(root / "run", root / "smp-r18.safetensors")
    return corpus, path


@pytest.mark.parametrize("arch", ["Unet", "FPN"])
def test_smp_networks_take_the_file_and_compute_our_features(exported, arch):
    _, path = exported
    net = getattr(smp, arch)("resnet18", encoder_weights=None, in_channels=1, classes=3)
    rep = ws.warm_start(net, path)
    assert rep.layout == "smp" and rep.complete
    x = torch.randn(2, 1, 64, 64, generator=torch.Generator().manual_seed(0))
    net.eval()
    enc = ws.load_encoder(path).eval()
    with torch.no_grad():
        theirs, ours = net.encoder(x)[1:], enc(x)
    for a, b in zip(theirs, ours, strict=True):
        torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-5)


def test_another_smp_encoder_is_refused_naming_the_first_mismatch(exported):
    _, path = exported
    net = smp.Unet("resnet34", encoder_weights=None, in_channels=1, classes=3)  # more blocks per stage
    with pytest.raises(WeightsMismatchError, match="encoder keys of the network with nothing in the file: encoder.layer1.2"):
        ws.warm_start(net, path)


def test_a_cube_corpus_refuses_the_smp_encoder(tmp_path):
    import numpy as np

    from conftest import textured
    from warmstart.corpus.build import build_corpus
    from warmstart.corpus.settings import CorpusSettings, SamplingSettings

    (tmp_path / "a").mkdir()
    np.save(tmp_path / "a" / "v.npy", textured(shape=(16, 32, 32), seed=1))
    cubes = build_corpus(tmp_path / "a", tmp_path / "c.zarr", CorpusSettings(sampling=SamplingSettings(
        spatial_dims=3, patch_size=16, assume_cubic_voxels=True)), report=False, progress=False).path
    with pytest.raises(PretrainError, match="2-D"):
        pretrain(cubes, tmp_path / "r", PretrainSettings(encoder="smp", encoder_params={"encoder_name": "resnet18"}, **QUICK),
                 progress=False)
