"""A 3-D network warm-started from a 2-D encoder file by inflating its kernels.

The check is the defining property of kernel inflation (Carreira and Zisserman, CVPR 2017): on a
volume constant along Z, a convolution whose k x k kernel became k x k x k (repeated, divided by
k) gives the 2-D response of one slice away from the Z borders; with the kernel in the middle
plane only (``center``) it gives it on every slice. So the 3-D network's first stage equals the
2-D encoder's first stage on the slice, computed by each library's own modules (nnU-Net's
dynamic-network-architectures, MONAI's DynUNet) rebuilt from the file. Files come from real
two-step pretraining runs on a tiny generated corpus (unit fixture data).
"""
from __future__ import annotations

import warnings

import numpy as np
import pytest

torch = pytest.importorskip("torch")

import warmstart as ws  # noqa: E402
from warmstart.encoders import encoder_from_spec  # noqa: E402
from warmstart.errors import WeightsMismatchError  # noqa: E402
from warmstart.export.inflate import inflate_kernel, spec_in_3d  # noqa: E402


def _arch2d(cls: str = "PlainConvUNet", features=(4, 8, 16)) -> dict:
    from tiny_plans import _arch, _resenc

    strides = [[1, 1]] + [[2, 2]] * (len(features) - 1)
    a = (_resenc if cls == "ResidualEncoderUNet" else _arch)(2, features, strides)
    return a


ENCODERS = {
    "unet": ("unet", {"base_width": 4, "depth": 3}),
    "nnunet-plain": ("nnunet", {"architecture": _arch2d()}),
    "nnunet-resenc": ("nnunet", {"architecture": _arch2d("ResidualEncoderUNet")}),
    "dynunet": ("monai_dynunet", {"filters": [4, 8, 16], "strides": [1, 2, 2]}),
}


@pytest.fixture(scope="module")
def corpus2d(tmp_path_factory):
    from conftest import tiny_corpus

    return tiny_corpus(tmp_path_factory.mktemp("inf2d"), n=1, shape=(8, 64, 64))


def _file(corpus, root, name, params):
    from warmstart.pretrain.loop import pretrain
    from warmstart.pretrain.settings import PretrainSettings

    if name == "nnunet":
        pytest.importorskip("dynamic_network_architectures")
    if name == "monai_dynunet":
        pytest.importorskip("monai")
    s = PretrainSettings(encoder=name, encoder_params=params, batch_size=4, max_steps=2, num_workers=0,
                         precision="32-true", accelerator="cpu", deterministic=True, checkpoint_every=50)
    run = pretrain(corpus, root / "run", s, progress=False).path
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return ws.export_encoder(run, root / "enc2d.safetensors")[0]


@pytest.fixture(scope="module", params=sorted(ENCODERS))
def pair(request, corpus2d, tmp_path_factory):
    """(2-D encoder rebuilt from its file, the file, the 3-D encoder its spec inflates to)."""
    name, params = ENCODERS[request.param]
    path = _file(corpus2d, tmp_path_factory.mktemp(request.param), name, params)
    enc2d = ws.load_encoder(path).eval()
    enc3d = encoder_from_spec(spec_in_3d(enc2d.manifest["encoder"]["spec"]))
    return enc2d, path, enc3d


def _constant_along_z(depth=8, side=32, seed=0):
    img = torch.from_numpy(np.random.default_rng(seed).normal(size=(1, 1, side, side)).astype(np.float32))
    return img, img.unsqueeze(2).repeat(1, 1, depth, 1, 1)


def test_center_inflation_gives_the_2d_first_stage_on_every_slice(pair):
    enc2d, path, enc3d = pair
    rep = ws.warm_start(enc3d, path, layout="encoder", inflate="center")
    assert rep.complete and rep.inflated, str(rep)
    enc3d.eval()
    img, vol = _constant_along_z()
    with torch.no_grad():
        want = enc2d(img)[0]
        got = enc3d(vol)[0]
    for z in range(vol.shape[2]):
        torch.testing.assert_close(got[:, :, z], want, atol=1e-5, rtol=1e-4)


def test_mean_inflation_gives_the_2d_first_stage_away_from_the_z_borders(pair):
    enc2d, path, enc3d = pair
    ws.warm_start(enc3d, path, layout="encoder", inflate="mean")
    enc3d.eval()
    img, vol = _constant_along_z(depth=12)
    with torch.no_grad():
        want = enc2d(img)[0]
        got = enc3d(vol)[0]
    if any(isinstance(m, torch.nn.modules.instancenorm._InstanceNorm) for m in enc3d.modules()):
        # Instance norm pools over the whole volume, border slices included: only the first
        # convolution is exact there, checked on its own.
        conv3, conv2 = (next(m for m in e.modules() if isinstance(m, (torch.nn.Conv2d, torch.nn.Conv3d)))
                        for e in (enc3d, enc2d))
        with torch.no_grad():
            got, want = conv3(vol), conv2(img)
    for z in range(2, vol.shape[2] - 2):  # two 3-wide convolutions reach two slices in from each border
        torch.testing.assert_close(got[:, :, z], want, atol=1e-5, rtol=1e-4)


def test_normalization_parameters_and_statistics_are_copied_channel_for_channel(pair):
    enc2d, path, enc3d = pair
    ws.warm_start(enc3d, path, layout="encoder", inflate="mean")
    ours, theirs = enc2d.state_dict(), enc3d.state_dict()
    norms = [k for k, v in ours.items() if v.ndim == 1 and not k.endswith("bias") or "norm" in k or "running" in k]
    assert norms
    for k in norms:
        assert torch.equal(ours[k], theirs[k]), k
    for k, v in ours.items():
        if v.ndim == 4:  # mean rule: the planes sum back to the 2-D kernel
            torch.testing.assert_close(theirs[k].sum(2), v)


def test_inflate_kernel_rules_by_hand():
    w = torch.arange(9.0).reshape(1, 1, 3, 3)
    mean = inflate_kernel(w, 3, "mean")
    assert mean.shape == (1, 1, 3, 3, 3) and torch.allclose(mean[0, 0, 1], w[0, 0] / 3)
    center = inflate_kernel(w, 3, "center")
    assert torch.equal(center[0, 0, 1], w[0, 0]) and center[0, 0, 0].abs().sum() == 0
    with pytest.raises(ValueError, match="odd"):
        inflate_kernel(w, 2, "center")


def test_a_depth_or_width_mismatch_is_refused_by_name(corpus2d, tmp_path):
    path = _file(corpus2d, tmp_path, "unet", {"base_width": 4, "depth": 3})
    from warmstart.encoders import build_encoder

    deeper = build_encoder("unet", base_width=4, depth=4, spatial_dims=3)
    with pytest.raises(WeightsMismatchError, match=r"levels\.3"):
        ws.warm_start(deeper, path, layout="encoder", inflate="mean")
    wider = build_encoder("unet", base_width=8, depth=3, spatial_dims=3)
    with pytest.raises(WeightsMismatchError, match=r"shape mismatches: levels\.0"):
        ws.warm_start(wider, path, layout="encoder", inflate="mean")


def test_without_inflate_the_2d_file_is_refused_and_the_message_names_inflate(pair):
    _, path, enc3d = pair
    with pytest.raises(WeightsMismatchError, match="inflate"):
        ws.warm_start(enc3d, path, layout="encoder")
    with pytest.raises(WeightsMismatchError, match="inflate must be one of"):
        ws.warm_start(enc3d, path, layout="encoder", inflate="tile")


def test_the_reference_unet_in_3d_takes_the_2d_file_and_its_groups_cover_every_parameter(corpus2d, tmp_path):
    path = _file(corpus2d, tmp_path, "unet", {"base_width": 4, "depth": 3})
    spec = spec_in_3d(ws.read_manifest(path)["encoder"]["spec"])
    net = ws.UNet(spec, classes=3)
    rep = ws.warm_start(net, path, inflate="center")
    assert rep.complete and rep.layout == "warmstart"
    groups = ws.finetune_groups(net, path, lr=1e-3, encoder_lr_factor=0.1, inflate="center")
    enc, rest = groups
    assert {id(p) for p in enc["params"]} == {id(p) for p in net.encoder.parameters()}
    assert enc["lr"] == pytest.approx(1e-4) and rest["lr"] == 1e-3
    assert len(enc["params"]) + len(rest["params"]) == len(list(net.parameters()))
    assert tuple(net(torch.zeros(1, 1, 8, 16, 16)).shape) == (1, 3, 8, 16, 16)


def test_cli_inflate_writes_the_checkpoint_nnunets_own_loader_takes(corpus2d, tmp_path):
    """nnunetv2's load_pretrained_weights (what nnUNetv2_train -pretrained_weights calls) is the reference."""
    pytest.importorskip("nnunetv2")
    import json

    from nnunetv2.run.load_pretrained_weights import load_pretrained_weights
    from nnunetv2.utilities.get_network_from_plans import get_network_from_plans

    from tiny_plans import PLANS
    from warmstart.cli import main
    from warmstart.encoders.nnunet import architecture_from_plans

    plans = tmp_path / "nnUNetPlans.json"
    plans.write_text(json.dumps(PLANS))
    path = _file(corpus2d, tmp_path, "nnunet", {"plans": str(plans), "configuration": "2d"})
    out = tmp_path / "pretrained.pth"
    assert main(["-q", "inflate", str(path), "--plans", f"{plans}:3d_fullres", "-o", str(out), "--rule", "center"]) == 0
    a = architecture_from_plans(PLANS, "3d_fullres")
    net = get_network_from_plans(a["network_class_name"], a["arch_kwargs"], a["_kw_requires_import"], 1, 3,
                                 allow_init=True, deep_supervision=False)
    load_pretrained_weights(net, str(out))
    enc2d = ws.load_encoder(path).eval()
    img, vol = _constant_along_z()
    net.eval()
    with torch.no_grad():
        torch.testing.assert_close(net.encoder(vol)[0][:, :, 3], enc2d(img)[0], atol=1e-5, rtol=1e-4)
    # A configuration of other widths is refused, naming the first tensor that does not fit.
    assert main(["-q", "inflate", str(path), "--plans", f"{plans}:3d_fullres_wide", "-o", str(tmp_path / "w.pth")]) == 1
    assert not (tmp_path / "w.pth").exists()
