"""The corpus store: a zarr v3 group on disk.

Layout of ``CORPUS/`` (a folder ending in ``.zarr`` by convention)::

    zarr.json            zarr group metadata
    patches/             (N, C, P, P) float16 or uint16, chunked along N
    index/<column>/      (N,) one array per column: source, axis, z, y, x, scale
    build.json           what the build was asked to do: settings, archive, source list, shard
    journal/NNNNNN.json  one record per finished source (ok or failed), written last
    manifest.json        sources, intensity references, patch statistics (written at the end)
    report/              montages, histograms, summary (see corpus.report)

Crash safety: a source's patches are appended first, its journal record is written after
(atomically, by rename). On resume the arrays are cut back to the end of the last journalled
source, so a source that was being written when the build died leaves no partial patches.
zarr's local store writes each chunk file atomically (zarr-python >= 3.1), so the chunk shared
with the previous source is never half-written.
"""
from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from ..errors import CorpusError
from .settings import StoreSettings

__all__ = ["CorpusStore", "StoreWriter", "open_corpus", "encode", "decode", "quantization_note", "write_json", "INDEX_COLUMNS", "STORE_VERSION"]

STORE_VERSION = 1
INDEX_COLUMNS = {"source": "int32", "axis": "int8", "z": "int32", "y": "int32", "x": "int32", "scale": "float32"}


def write_json(path: str | os.PathLike[str], data: Any) -> None:
    """Write JSON atomically (temporary file, fsync, rename): a reader never sees half a file."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp")
    with open(tmp, "w") as fh:
        json.dump(data, fh, indent=1, sort_keys=False, allow_nan=False)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)


def encode(x: np.ndarray, s: StoreSettings) -> tuple[np.ndarray, dict[str, float]]:
    """Encode normalized float32 patches for storage.

    Returns
    -------
    codes : ndarray
        float16 or uint16.
    error : dict
        ``max_abs_error`` (measured on these patches) and ``clipped`` (values outside the code range).
    """
    x = np.asarray(x, dtype=np.float32)
    if s.dtype == "float16":
        big = np.abs(x) > 65504.0
        codes = np.clip(x, -65504.0, 65504.0).astype(np.float16)
        err = float(np.max(np.abs(codes.astype(np.float32) - x), initial=0.0)) if x.size else 0.0
        return codes, {"max_abs_error": err, "clipped": int(big.sum())}
    lo, hi = s.uint16_range
    scaled = (x - lo) * (65535.0 / (hi - lo))
    clipped = int(((scaled < 0) | (scaled > 65535)).sum())
    codes = np.clip(np.rint(scaled), 0, 65535).astype(np.uint16)
    back = decode(codes, {"dtype": "uint16", "uint16_range": [lo, hi]})
    inside = (x >= lo) & (x <= hi)
    err = float(np.max(np.abs(back - x)[inside], initial=0.0)) if x.size else 0.0
    return codes, {"max_abs_error": err, "clipped": clipped}


def decode(codes: np.ndarray, encoding: Mapping[str, Any]) -> np.ndarray:
    """Decode stored patches to normalized float32."""
    if encoding["dtype"] == "float16":
        return np.asarray(codes, dtype=np.float32)
    lo, hi = encoding["uint16_range"]
    return (np.asarray(codes, dtype=np.float32) * np.float32((hi - lo) / 65535.0) + np.float32(lo)).astype(np.float32)


def quantization_note(s: StoreSettings) -> dict[str, Any]:
    """The stated (worst-case) quantization error of an encoding."""
    if s.dtype == "float16":
        return {"dtype": "float16", "bound": "relative error <= 2^-11 (half a float16 ulp); |x| > 65504 clipped"}
    lo, hi = s.uint16_range
    step = (hi - lo) / 65535.0
    return {"dtype": "uint16", "uint16_range": [lo, hi], "step": step,
            "bound": f"absolute error <= {step / 2:.3g} (half a step) inside [{lo}, {hi}]; values outside clipped"}


class CorpusStore:
    """Read access to a built corpus.

    Attributes
    ----------
    path : Path
    patches : zarr.Array
        (N, C, P, P) stored codes; use :meth:`read` for normalized float32.
    manifest : dict
    """

    def __init__(self, path: str | os.PathLike[str]) -> None:
        import zarr

        self.path = Path(path)
        mpath = self.path / "manifest.json"
        if not mpath.exists():
            raise CorpusError(f"{self.path}: not a finished corpus (no manifest.json); was its build interrupted?")
        self.manifest: dict[str, Any] = json.loads(mpath.read_text())
        if self.manifest.get("format_version") != STORE_VERSION:
            raise CorpusError(f"{self.path}: store format {self.manifest.get('format_version')!r}, this warmstart reads {STORE_VERSION}")
        root = zarr.open_group(str(self.path), mode="r")
        self.patches = root["patches"]
        self._index = root["index"]
        n = self.manifest["patches"]["count"]
        if self.patches.shape[0] != n:
            raise CorpusError(f"{self.path}: manifest lists {n} patches, the array holds {self.patches.shape[0]}")

    def __len__(self) -> int:
        return int(self.patches.shape[0])

    @property
    def encoding(self) -> dict[str, Any]:
        return self.manifest["patches"]["encoding"]

    def read(self, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Patches ``start:stop`` as normalized float32 (N, C, P, P)."""
        return decode(self.patches[start:stop], self.encoding)

    def take(self, indices: np.ndarray) -> np.ndarray:
        """Patches at arbitrary indices (sorted reads), as normalized float32."""
        indices = np.asarray(indices, dtype=np.int64)
        order = np.argsort(indices)
        out = np.empty((len(indices),) + tuple(self.patches.shape[1:]), dtype=np.float32)
        if len(indices):
            out[order] = decode(self.patches.get_orthogonal_selection((indices[order],)), self.encoding)
        return out

    def index(self) -> dict[str, np.ndarray]:
        """The per-patch provenance table: column -> (N,) array."""
        return {c: np.asarray(self._index[c][:]) for c in INDEX_COLUMNS}


def open_corpus(path: str | os.PathLike[str]) -> CorpusStore:
    """Open a finished corpus store for reading."""
    if not Path(path).exists():
        raise CorpusError(f"{path}: no such corpus")
    return CorpusStore(path)


class StoreWriter:
    """Appends sources to a store being built, journals them, and resumes after a crash."""

    def __init__(self, path: Path, build: dict[str, Any], s: StoreSettings, patch_shape: tuple[int, int, int]) -> None:
        import zarr

        self.path = Path(path)
        self.settings = s
        self.journal_dir = self.path / "journal"
        dtype = np.float16 if s.dtype == "float16" else np.uint16
        build_file = self.path / "build.json"
        if build_file.exists():
            old = json.loads(build_file.read_text())
            for key in ("settings", "sources", "shard", "archive_names"):
                if old.get(key) != build.get(key):
                    raise CorpusError(
                        f"{self.path}: exists and was started with different {key}; "
                        "use a new output folder, or --fresh to start over"
                    )
            self.root = zarr.open_group(str(self.path), mode="r+")
            self.patches = self.root["patches"]
            self.index = {c: self.root["index"][c] for c in INDEX_COLUMNS}
        else:
            if self.path.exists() and any(self.path.iterdir()):
                raise CorpusError(f"{self.path}: exists and is not a corpus build; choose an empty or new folder")
            self.path.mkdir(parents=True, exist_ok=True)
            self.root = zarr.open_group(str(self.path), mode="w", zarr_format=3)
            self.patches = self.root.create_array("patches", shape=(0,) + patch_shape, dtype=dtype,
                                                  chunks=(s.chunk_patches,) + patch_shape)
            idx = self.root.create_group("index")
            self.index = {c: idx.create_array(c, shape=(0,), dtype=t, chunks=(max(4096, s.chunk_patches * 16),))
                          for c, t in INDEX_COLUMNS.items()}
            self.journal_dir.mkdir(exist_ok=True)
            write_json(build_file, build)
        self.journal_dir.mkdir(exist_ok=True)

    def records(self) -> list[dict[str, Any]]:
        """Journalled source records, by position."""
        out = [json.loads(p.read_text()) for p in sorted(self.journal_dir.glob("[0-9]*.json"))]
        return sorted(out, key=lambda r: r["position"])

    def recover(self) -> list[dict[str, Any]]:
        """Cut the arrays back to the journalled patches; return the journalled records."""
        recs = self.records()
        n = max((r["stop"] for r in recs), default=0)
        if self.patches.shape[0] != n:
            self.patches.resize((n,) + tuple(self.patches.shape[1:]))
        for arr in self.index.values():
            if arr.shape[0] != n:
                arr.resize((n,))
        (self.path / "manifest.json").unlink(missing_ok=True)
        return recs

    def append(self, codes: np.ndarray, columns: Mapping[str, np.ndarray], record: dict[str, Any]) -> dict[str, Any]:
        """Append one source's patches and index rows, then journal it."""
        start = int(self.patches.shape[0])
        m = int(len(codes))
        if m:
            self.patches.resize((start + m,) + tuple(self.patches.shape[1:]))
            self.patches[start:start + m] = codes
            for c, arr in self.index.items():
                arr.resize((start + m,))
                arr[start:start + m] = np.asarray(columns[c], dtype=INDEX_COLUMNS[c])
        record = dict(record, start=start, stop=start + m)
        write_json(self.journal_dir / f"{record['position']:06d}.json", record)
        return record
