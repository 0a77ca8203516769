"""Export and warm start: one safetensors file with the encoder and its manifest, and the
functions that load it into other networks and prepare new data for it.

``file``, ``manifest``, ``prepare`` and ``card`` need numpy only; ``pack`` (export), ``load`` and
``layouts`` use torch when called.
"""
from .file import read_encoder_file, read_manifest
from .manifest import MANIFEST_VERSION
from .prepare import prepare

__all__ = ["read_manifest", "read_encoder_file", "prepare", "MANIFEST_VERSION"]
