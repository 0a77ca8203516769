"""The encoder file: tensors in safetensors, the manifest as JSON in the safetensors metadata.

safetensors holds only raw tensors and a string-to-string metadata table, so loading a shared
file can never run code (unlike a pickle). The manifest sits under one metadata key.

Integrity: the manifest's ``tensors.sha256`` covers the tensors, and its ``digest`` covers the
manifest itself: ``digest.sections`` holds the sha256 of each top-level field (canonical JSON),
``digest.manifest_sha256`` that of the whole manifest but ``digest``, and ``digest.sha256``
combines the manifest's and the tensors' hashes into the one fingerprint of the file's content
that ``warmstart inspect`` prints. Every reader recomputes the manifest's hashes (cheap: the
header only) and refuses a file whose manifest was edited, naming the fields that differ; loading
the tensors also checks theirs. The hashes prove the file is the one that was exported, unchanged;
they do not prove who exported it: compare ``digest.sha256`` with the value its publisher gives.
Reading needs numpy only: ``warmstart inspect`` and :func:`warmstart.prepare` never import torch.
"""
from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from ..errors import ExportError

__all__ = ["METADATA_KEY", "tensor_digest", "manifest_digest", "write_encoder_file", "read_encoder_file", "read_manifest"]

METADATA_KEY = "warmstart.manifest"


def _contiguous(a: np.ndarray) -> np.ndarray:
    """C-contiguous, keeping 0-d arrays 0-d (``np.ascontiguousarray`` makes them 1-d)."""
    a = np.asarray(a)
    return a if a.flags.c_contiguous else a.copy(order="C")


def tensor_digest(arrays: Mapping[str, np.ndarray]) -> str:
    """sha256 over the tensors in name order: name, dtype, shape and raw bytes of each.

    Examples
    --------
    >>> a = {"w": np.zeros((2, 2), np.float32)}
    >>> tensor_digest(a) == tensor_digest({"w": np.zeros((2, 2), np.float32)})
    True
    >>> tensor_digest(a) == tensor_digest({"w": np.ones((2, 2), np.float32)})
    False
    """
    h = hashlib.sha256()
    for name in sorted(arrays):
        a = _contiguous(arrays[name])
        h.update(json.dumps([name, a.dtype.str, list(a.shape)]).encode())
        h.update(memoryview(a).cast("B"))
    return h.hexdigest()


def _canonical(value: Any) -> bytes:
    """The one byte string of a JSON value: sorted keys, no spaces, UTF-8 (floats as Python's repr,
    which JSON reads back exactly)."""
    return json.dumps(value, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False).encode()


def manifest_digest(manifest: Mapping[str, Any]) -> dict[str, Any]:
    """The ``digest`` of a manifest (see the module docstring); ``digest`` itself is left out.

    Examples
    --------
    >>> d = manifest_digest({"a": 1, "tensors": {"sha256": "00"}})
    >>> d == manifest_digest({"tensors": {"sha256": "00"}, "a": 1})  # key order does not matter
    True
    >>> d["sections"]["a"] == manifest_digest({"a": 2, "tensors": {"sha256": "00"}})["sections"]["a"]
    False
    """
    body = {k: v for k, v in manifest.items() if k != "digest"}
    sections = {k: hashlib.sha256(_canonical(v)).hexdigest() for k, v in sorted(body.items())}
    whole = hashlib.sha256(_canonical(body)).hexdigest()
    tensors = str(body.get("tensors", {}).get("sha256", ""))
    return {"sections": sections, "manifest_sha256": whole,
            "sha256": hashlib.sha256(f"{whole}:{tensors}".encode()).hexdigest()}


def _check_digest(d: Mapping[str, Any], path: str | os.PathLike[str]) -> None:
    """Refuse a manifest whose recorded digest does not match it (naming the fields that differ);
    version 1 files, written before the digest existed, pass with a warning."""
    recorded = d.get("digest")
    if recorded is None:
        if d.get("format_version") is None and d.get("version") == 1:
            import warnings

            warnings.warn(f"{path}: a version 1 encoder file: its tensors are checked, its manifest is not "
                          "(re-export it to cover both)", UserWarning, stacklevel=3)
            return
        raise ExportError(f"{path}: the manifest carries no digest; it was not written by warmstart export or was "
                          "altered: refusing it")
    want = manifest_digest(d)
    if not isinstance(recorded, Mapping) or recorded.get("manifest_sha256") != want["manifest_sha256"]:
        had = recorded.get("sections", {}) if isinstance(recorded, Mapping) else {}
        changed = sorted(k for k in set(want["sections"]) | set(had) if want["sections"].get(k) != had.get(k))
        raise ExportError(f"{path}: the manifest was altered after export (fields that differ from their recorded "
                          f"sha256: {', '.join(changed) or 'the digest itself'}); refusing it: its intensity rule and "
                          "standardization could no longer be trusted")
    if recorded.get("sha256") != want["sha256"]:
        raise ExportError(f"{path}: the file's recorded fingerprint (digest.sha256) does not match its manifest; refusing it")


def write_encoder_file(path: str | os.PathLike[str], arrays: Mapping[str, np.ndarray], manifest: Mapping[str, Any]) -> Path:
    """Write tensors and manifest atomically (a temporary file renamed into place), so an
    interrupted export never leaves a half-written file under the final name.

    The manifest's ``tensors`` entry (count and sha256) and its ``digest`` are filled in here.
    """
    from safetensors.numpy import save_file

    path = Path(path)
    _check_target(path)
    arrays = {k: _contiguous(v) for k, v in arrays.items()}
    full = dict(manifest)
    full["tensors"] = {"count": len(arrays), "sha256": tensor_digest(arrays),
                       "parameters": int(sum(a.size for k, a in arrays.items() if not k.endswith("num_batches_tracked")))}
    full.pop("digest", None)
    full["digest"] = manifest_digest(full)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.partial")
    try:
        save_file(arrays, str(tmp), metadata={METADATA_KEY: json.dumps(full, allow_nan=False)})
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # the user's usual permissions, not the writer's private 0600
        os.replace(tmp, path)
    except BaseException as err:
        tmp.unlink(missing_ok=True)  # never leave a partial file behind
        if isinstance(err, OSError) or "No space left" in str(err):
            raise ExportError(f"{path}: cannot be written ({getattr(err, 'strerror', None) or err}); "
                              "nothing was left behind") from err
        raise
    return path


def _check_target(path: Path) -> None:
    """Refuse to write over a folder or over a file that is not a warmstart encoder file."""
    if path.is_dir():
        raise ExportError(f"{path}: is a folder; give the encoder file's name, e.g. {path / 'encoder.safetensors'}")
    if path.exists():
        try:
            meta = _open(path, lambda f: f.metadata())
        except ExportError:
            meta = None
        if not meta or METADATA_KEY not in meta:
            raise ExportError(f"{path}: exists and is not a warmstart encoder file; not overwriting it "
                              "(choose another name or remove it yourself)")


def read_manifest(path: str | os.PathLike[str]) -> dict[str, Any]:
    """The manifest of an encoder file (its header only; no tensor is read or checked)."""
    return _manifest(_open(path, lambda f: f.metadata()), path)


def read_encoder_file(path: str | os.PathLike[str], verify: bool = True) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    """Manifest and tensors of an encoder file.

    Parameters
    ----------
    path : path
    verify : bool
        Recompute the tensors' sha256 and refuse the file when it differs from the manifest's.

    Raises
    ------
    ExportError
        Not a readable safetensors file, no or an unknown manifest, or tensors that do not match
        the recorded hash (the file was damaged or altered).
    """

    def both(f: Any) -> tuple[Any, dict[str, np.ndarray]]:
        return f.metadata(), {k: f.get_tensor(k) for k in f.keys()}

    meta, arrays = _open(path, both)
    manifest = _manifest(meta, path)
    if verify:
        want = manifest["tensors"]["sha256"]
        got = tensor_digest(arrays)
        if got != want:
            raise ExportError(f"{path}: the tensors do not match the sha256 in the file's manifest "
                              f"({got[:12]}... instead of {want[:12]}...): the file was damaged or altered; "
                              "refusing to load it")
    return manifest, arrays


def _open(path: str | os.PathLike[str], fn: Any) -> Any:
    from safetensors import safe_open

    if not Path(path).is_file():
        raise ExportError(f"{path}: no such encoder file")
    try:
        with safe_open(str(path), framework="np") as f:
            return fn(f)
    except ExportError:
        raise
    except Exception as e:  # safetensors raises its own error types for damaged headers
        raise ExportError(f"{path}: not a readable safetensors encoder file ({e})") from e


def _manifest(meta: Mapping[str, str] | None, path: str | os.PathLike[str]) -> dict[str, Any]:
    """The checked manifest of a file's metadata: digest (on the stored layout), then format,
    version and fields (``check_manifest``, which also converts version 1)."""
    from .manifest import FORMAT, check_manifest

    d = _parse(meta, path)
    if isinstance(d, dict) and d.get("format") == FORMAT:  # other formats: check_manifest says so
        _check_digest(d, path)
    return check_manifest(d, path)


def _parse(meta: Mapping[str, str] | None, path: str | os.PathLike[str]) -> dict[str, Any]:
    if not meta or METADATA_KEY not in meta:
        raise ExportError(f"{path}: a safetensors file without a warmstart manifest (metadata key {METADATA_KEY!r}); "
                          "it was not written by warmstart export")
    try:
        return json.loads(meta[METADATA_KEY])
    except json.JSONDecodeError as e:
        raise ExportError(f"{path}: the manifest is not valid JSON ({e})") from e
