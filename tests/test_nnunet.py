"""nnU-Net's networks: pretrained here, loaded by nnU-Net itself.

References: nnunetv2's own ``get_network_from_plans`` (builds the network from a plans
configuration) and ``load_pretrained_weights`` (what ``nnUNetv2_train -pretrained_weights``
calls); the networks are dynamic-network-architectures' ``PlainConvUNet``. The plans entries
below follow the layout nnunetv2 writes (``configurations`` -> ``architecture`` with
``network_class_name``, ``arch_kwargs``, ``_kw_requires_import``; ``inherits_from``), with tiny
widths so the tests run on a CPU (``tests/tiny_plans.py``): unit fixture data, not a real plan.
"""
from __future__ import annotations

import json
import warnings

import pytest

torch = pytest.importorskip("torch")
pytest.importorskip("dynamic_network_architectures")

import warmstart as ws  # noqa: E402
from warmstart.cli import main  # noqa: E402
from warmstart.encoders import build_encoder  # noqa: E402
from warmstart.encoders.nnunet import architecture_from_plans  # noqa: E402
from tiny_plans import PLANS  # noqa: E402
from warmstart.errors import WeightsMismatchError  # noqa: E402


def _nnunet_network(configuration: str):
    """The network nnU-Net itself builds for a configuration of PLANS."""
    from nnunetv2.utilities.get_network_from_plans import get_network_from_plans

    a = architecture_from_plans(PLANS, configuration)
    return get_network_from_plans(a["network_class_name"], a["arch_kwargs"], a["_kw_requires_import"], 1, 3,
                                  allow_init=True, deep_supervision=False)


@pytest.fixture(scope="module")
def plans(tmp_path_factory):
    p = tmp_path_factory.mktemp("plans") / "nnUNetPlans.json"
    p.write_text(json.dumps(PLANS))
    return p


@pytest.fixture(scope="module")
def cubes(tmp_path_factory):
    from conftest import tiny_corpus

    return tiny_corpus(tmp_path_factory.mktemp("nn3d"), n=2, shape=(32, 48, 48),
                       sampling=dict(spatial_dims=3, patch_size=16, assume_cubic_voxels=True))


@pytest.fixture(scope="module")
def run3d(cubes, plans, tmp_path_factory):
    """`warmstart pretrain CUBES --encoder PLANS.json:3d_fullres`, then both exports."""
    root = tmp_path_factory.mktemp("run3d")
    assert main(["-q", "pretrain", str(cubes), "-o", str(root / "run"), "--recipe", "smoke-3d",
                 "--encoder", f"{plans}:3d_fullres", "--max-steps", "2", "--deterministic"]) == 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["-q", "export", str(root / "run"), "-o", str(root / "enc.safetensors")]) == 0
        assert main(["-q", "export", str(root / "run"), "--for", "nnunet", "-o", str(root / "pretrained.pth")]) == 0
    return root


def test_plans_configurations_resolve_with_inheritance_and_clear_refusals(plans):
    a = architecture_from_plans(plans, "3d_big_batch")  # inherits the parent's architecture
    assert a == architecture_from_plans(plans, "3d_fullres")
    assert architecture_from_plans(plans, "3d_fullres_wide")["arch_kwargs"]["features_per_stage"] == [8, 16, 32, 64]
    with pytest.raises(ValueError, match=r"no configuration '3d_lowres'; it defines 2d, 3d_big_batch, 3d_deeper"):
        architecture_from_plans(plans, "3d_lowres")
    with pytest.raises(ValueError, match="no 'architecture' entry"):
        architecture_from_plans({"configurations": {"2d": {"UNet_class_name": "PlainConvUNet"}}}, "2d")


@pytest.mark.parametrize("configuration", ["2d", "3d_fullres", "3d_resenc"])
def test_the_encoder_is_nnunets_own_module_with_its_keys(plans, configuration):
    enc = build_encoder("nnunet", in_channels=1, plans=str(plans), configuration=configuration)
    theirs = _nnunet_network(configuration).encoder
    assert type(enc) is type(theirs) and type(enc).__module__.startswith("dynamic_network_architectures")
    assert {k: tuple(v.shape) for k, v in enc.state_dict().items()} == \
        {k: tuple(v.shape) for k, v in theirs.state_dict().items()}
    dims = 3 if configuration.startswith("3d") else 2
    assert [(s.channels, s.stride) for s in enc.spec.stages] == [(4, 1), (8, 2), (16, 4), (32, 8)]
    assert enc.spec.params.get("spatial_dims", 2) == dims and "plans" not in enc.spec.params
    assert enc.spec.params["library"]["name"] == "dynamic_network_architectures"
    x = torch.zeros((1, 1) + (16,) * dims)
    assert [tuple(f.shape[1:2]) + tuple(f.shape[2:]) for f in enc(x)] == \
        [(c,) + (16 // s,) * dims for c, s in [(4, 1), (8, 2), (16, 4), (32, 8)]]


def test_uneven_strides_and_the_wrong_dimensionality_are_refused(plans, cubes, tmp_path, capsys):
    with pytest.raises(ValueError, match="downsamples the axes unevenly"):
        build_encoder("nnunet", plans=str(plans), configuration="3d_thick_slices")
    assert main(["-q", "pretrain", str(cubes), "-o", str(tmp_path / "r"), "--recipe", "smoke-3d",
                 "--encoder", f"{plans}:2d", "--max-steps", "1"]) == 1
    assert "builds a 2-D network" in capsys.readouterr().err


def test_the_run_records_the_architecture_not_the_plans_path(run3d):
    recipe = json.loads((run3d / "run" / "recipe.json").read_text())["pretrain"]
    assert recipe["encoder"] == "nnunet" and "plans" not in recipe["encoder_params"]
    assert recipe["encoder_params"]["configuration"] == "3d_fullres"
    assert recipe["encoder_params"]["architecture"] == architecture_from_plans(PLANS, "3d_fullres")


def test_nnunets_own_loader_takes_the_file_and_computes_our_features(run3d):
    from nnunetv2.run.load_pretrained_weights import load_pretrained_weights

    net = _nnunet_network("3d_fullres")
    load_pretrained_weights(net, str(run3d / "pretrained.pth"))
    enc = ws.load_encoder(run3d / "enc.safetensors").eval()
    for k, v in enc.state_dict().items():  # encoder weights equal the file's
        torch.testing.assert_close(net.encoder.state_dict()[k], v, rtol=0, atol=0)
    x = torch.randn(2, 1, 16, 16, 16, generator=torch.Generator().manual_seed(0))
    net.eval()
    with torch.no_grad():
        theirs, ours = net.encoder(x), enc(x)
    for a, b in zip(theirs, ours, strict=True):
        torch.testing.assert_close(a, b, rtol=1e-5, atol=1e-5)
    # the segmentation layers stay nnU-Net's (3 classes here; the file's network had 2)
    assert net.decoder.seg_layers[-1].weight.shape[0] == 3


def test_the_nnunet_file_holds_only_tensors_and_says_its_decoder_is_not_pretrained(run3d, capsys):
    ck = torch.load(run3d / "pretrained.pth", weights_only=True)  # no pickled code needed
    assert set(ck) == {"network_weights", "warmstart.manifest"}
    assert all(isinstance(v, torch.Tensor) for v in ck["network_weights"].values())
    from warmstart.export.nnunet_file import read_nnunet_file

    m, state = read_nnunet_file(run3d / "pretrained.pth")
    assert m["nnunet"]["pretrained"] == ["encoder"] and "not pretrained" in m["nnunet"]["decoder"]
    assert any(k.startswith("decoder.") for k in state) and m["input"]["spatial_dims"] == 3
    assert main(["inspect", str(run3d / "pretrained.pth"), "--verify"]) == 0
    out = capsys.readouterr().out
    assert "not pretrained: nnU-Net's own initialization" in out and "PlainConvUNet" in out


def test_the_nnunet_line_and_the_trainer_it_was_measured_against_are_nnunets_and_the_card_says_them(run3d):
    """The warm-up trainer the recommendation was measured against must exist in the installed
    nnunetv2 (the reference: nnunetv2 2.8's own lr_schedule variants)."""
    pytest.importorskip("nnunetv2")
    import importlib

    from warmstart.export.card import model_card
    from warmstart.export.nnunet_file import read_nnunet_file
    from warmstart.finetune import NNUNET_TRIED

    m, _ = read_nnunet_file(run3d / "pretrained.pth")
    command = m["fine_tuning"]["nnunet"]["command"]
    mod = importlib.import_module(f"nnunetv2.training.nnUNetTrainer.variants.lr_schedule.{NNUNET_TRIED}")
    assert getattr(mod, NNUNET_TRIED).__name__ == NNUNET_TRIED
    assert command.startswith("nnUNetv2_train") and "-pretrained_weights" in command
    assert command in model_card(m) and NNUNET_TRIED in model_card(m)
    assert ws.read_manifest(run3d / "enc.safetensors")["fine_tuning"]["nnunet"]["command"] == command


def test_warm_start_into_nnunet_networks_and_refusals_naming_the_first_mismatch(run3d):
    file = run3d / "enc.safetensors"
    net = _nnunet_network("3d_fullres")
    rep = ws.warm_start(net, file)
    assert rep.layout == "nnunet" and rep.complete
    with pytest.raises(WeightsMismatchError, match=r"shape mismatches: encoder\.stages\.0\.0\.convs\.0\.conv\.weight "
                                                   r"ours \(4, 1, 3, 3, 3\) theirs \(8, 1, 3, 3, 3\)"):
        ws.warm_start(_nnunet_network("3d_fullres_wide"), file)
    with pytest.raises(WeightsMismatchError, match="holds a 3-D encoder .* is a 2-D network"):
        ws.warm_start(_nnunet_network("2d"), file)
    with pytest.raises(WeightsMismatchError, match=r"encoder keys of the network with nothing in the file: "
                                                   r"encoder\.stages\.4\.0\.convs\.0\.conv\.weight"):
        ws.warm_start(_nnunet_network("3d_deeper"), file)  # one stage more
    with pytest.raises(WeightsMismatchError, match="the file holds a nnunet encoder"):  # a layout for other encoders
        ws.warm_start(net, file, layout="smp")


def test_two_input_channels_adapt_both_names_of_the_first_convolution(run3d):
    # nnU-Net's blocks register their convolution twice (conv and all_modules.0): one tensor, two keys.
    net = ws.UNet.from_file(run3d / "enc.safetensors", classes=2, in_channels=2)
    rep = net.warm_start_report
    assert rep.complete and sorted(rep.adapted) == [
        "encoder.stages.0.0.convs.0.all_modules.0.weight 1 -> 2 channels",
        "encoder.stages.0.0.convs.0.conv.weight 1 -> 2 channels"]
    assert tuple(net(torch.zeros(1, 2, 16, 16, 16)).shape) == (1, 2, 16, 16, 16)


def test_restoration_trains_nnunets_own_decoder_and_the_file_carries_it(cubes, plans, tmp_path):
    from nnunetv2.run.load_pretrained_weights import load_pretrained_weights

    assert main(["-q", "pretrain", str(cubes), "-o", str(tmp_path / "run"), "--recipe", "smoke-3d", "--encoder",
                 f"{plans}:3d_fullres", "--method", "restore", "--max-steps", "2", "--deterministic"]) == 0
    networks = json.loads((tmp_path / "run" / "networks.json").read_text())
    assert networks["decoder"]["kind"] == "nnunet"
    ck = torch.load(tmp_path / "run" / "checkpoints" / "last.ckpt", weights_only=True)["state_dict"]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert main(["-q", "export", str(tmp_path / "run"), "--for", "nnunet", "-o", str(tmp_path / "p.pth")]) == 0
        assert main(["-q", "export", str(tmp_path / "run"), "--with-decoder", "-o", str(tmp_path / "w.safetensors")]) == 0
    net = _nnunet_network("3d_fullres")
    load_pretrained_weights(net, str(tmp_path / "p.pth"))  # nnU-Net's own loader
    prefix = networks["decoder"]["key_prefix"] + "decoder."
    trained = {k[len(prefix):]: v for k, v in ck.items() if k.startswith(prefix)}
    compared = 0
    for k, v in net.decoder.state_dict().items():
        if k.startswith(("stages.", "transpconvs.")):  # the decoder proper: as trained
            torch.testing.assert_close(v, trained[k], rtol=0, atol=0)
            compared += 1
    assert compared > 0
    from warmstart.export.nnunet_file import read_nnunet_file

    m = read_nnunet_file(tmp_path / "p.pth")[0]
    assert m["nnunet"]["pretrained"] == ["encoder", "decoder"] and "pretrained with the encoder by restore" in \
        m["nnunet"]["decoder"]
    # our own warm start places the same decoder into a network nnU-Net builds
    other = _nnunet_network("3d_fullres")
    rep = ws.warm_start(other, tmp_path / "w.safetensors", decoder=True)
    assert rep.complete and rep.decoder and "loaded" in rep.decoder_note
    for k in rep.decoder:
        torch.testing.assert_close(other.state_dict()[k], trained[k[len("decoder."):]], rtol=0, atol=0)


def test_a_missing_client_library_is_named_with_its_pip_line(run3d, monkeypatch):
    import importlib.metadata

    from warmstart.errors import ExportError

    real = importlib.metadata.version

    def version(name):
        if name == "dynamic-network-architectures":
            raise importlib.metadata.PackageNotFoundError(name)
        return real(name)

    monkeypatch.setattr(importlib.metadata, "version", version)
    with pytest.raises(ExportError, match="pip install dynamic-network-architectures"):
        ws.load_encoder(run3d / "enc.safetensors")


@pytest.mark.parametrize("configuration", ["2d", "3d_fullres"])
def test_masked_modelling_keeps_hidden_blocks_hidden_in_nnunets_encoder_and_trains_its_decoder(configuration):
    from warmstart.encoders.nnunet import NNUNetDecoder
    from warmstart.pretrain.methods import build_method

    enc = build_encoder("nnunet", architecture=architecture_from_plans(PLANS, configuration))
    m = build_method("masked", enc)
    assert isinstance(m.decoder, NNUNetDecoder)
    dims = 3 if configuration.startswith("3d") else 2
    x = torch.randn((2, 1) + (16,) * dims, generator=torch.Generator().manual_seed(0))
    loss, parts = m.masked_loss(x, torch.Generator().manual_seed(1))
    hidden = parts["hidden"]
    for f in parts["features"]:  # each stage map is zero wherever its cell is hidden, and not zero elsewhere
        h = torch.nn.functional.interpolate(hidden, size=tuple(f.shape[2:]), mode="nearest")
        assert float((f.detach() * h).abs().max()) == 0.0 and float((f.detach() * (1 - h)).abs().max()) > 0.0
    x2 = torch.where(hidden.bool(), torch.randn(x.shape) * 10, x)  # hidden voxels carry no information
    _, parts2 = m.masked_loss(x2, torch.Generator().manual_seed(1))
    for a, b in zip(parts["features"], parts2["features"]):
        torch.testing.assert_close(a, b, rtol=0, atol=0)
    loss.backward()  # nnU-Net's decoder learns
    assert m.decoder.decoder.stages[0].convs[0].conv.weight.grad is not None
