"""A tiny nnU-Net plans file (unit fixture data) in the layout nnunetv2 writes: ``configurations`` ->
``architecture`` with ``network_class_name``, ``arch_kwargs`` and ``_kw_requires_import``, and
``inherits_from``. Widths are tiny so that tests build and train the networks on a CPU.
"""
from __future__ import annotations


def _arch(dims: int, features, strides, conv_per_stage=2) -> dict:
    n = len(features)
    return {
        "network_class_name": "dynamic_network_architectures.architectures.unet.PlainConvUNet",
        "arch_kwargs": {
            "n_stages": n, "features_per_stage": list(features),
            "conv_op": f"torch.nn.modules.conv.Conv{dims}d",
            "kernel_sizes": [[3] * dims] * n, "strides": strides,
            "n_conv_per_stage": [conv_per_stage] * n, "n_conv_per_stage_decoder": [1] * (n - 1),
            "conv_bias": True, "norm_op": f"torch.nn.modules.instancenorm.InstanceNorm{dims}d",
            "norm_op_kwargs": {"eps": 1e-05, "affine": True}, "dropout_op": None, "dropout_op_kwargs": None,
            "nonlin": "torch.nn.LeakyReLU", "nonlin_kwargs": {"inplace": True},
        },
        "_kw_requires_import": ["conv_op", "norm_op", "dropout_op", "nonlin"],
    }


def _resenc(dims: int, features, strides) -> dict:
    """The residual-encoder network of nnU-Net's ResEnc presets (n_blocks_per_stage for the encoder)."""
    a = _arch(dims, features, strides)
    a["network_class_name"] = "dynamic_network_architectures.architectures.unet.ResidualEncoderUNet"
    a["arch_kwargs"]["n_blocks_per_stage"] = a["arch_kwargs"].pop("n_conv_per_stage")
    return a


ISO3 = [[1, 1, 1], [2, 2, 2], [2, 2, 2], [2, 2, 2]]
PLANS = {
    "dataset_name": "Dataset001_Filters", "plans_name": "nnUNetPlans",
    "configurations": {
        "2d": {"data_identifier": "nnUNetPlans_2d", "patch_size": [32, 32],
               "architecture": _arch(2, (4, 8, 16, 32), [[1, 1], [2, 2], [2, 2], [2, 2]])},
        "3d_fullres": {"data_identifier": "nnUNetPlans_3d_fullres", "patch_size": [16, 16, 16],
                       "architecture": _arch(3, (4, 8, 16, 32), ISO3)},
        "3d_fullres_wide": {"inherits_from": "3d_fullres", "architecture": _arch(3, (8, 16, 32, 64), ISO3)},
        "3d_big_batch": {"inherits_from": "3d_fullres", "batch_size": 4},
        "3d_deeper": {"inherits_from": "3d_fullres", "architecture": _arch(3, (4, 8, 16, 32, 64), ISO3 + [[2, 2, 2]])},
        "3d_resenc": {"inherits_from": "3d_fullres", "architecture": _resenc(3, (4, 8, 16, 32), ISO3)},
        "3d_thick_slices": {"architecture": _arch(3, (4, 8, 16, 32), [[1, 1, 1], [1, 2, 2], [2, 2, 2], [2, 2, 2]])},
    },
}
