"""The corpus store: a zarr v3 group on disk.

Layout of ``CORPUS/`` (a folder ending in ``.zarr`` by convention)::

    zarr.json            zarr group metadata
    patches/             (N, C, P, P) float16 or uint16, chunked along N; (N, 1, P, P, P) cubes in
                         (Z, Y, X) order for a 3-D corpus (manifest ``patches.spatial_dims``)
    index/<column>/      (N,) one array per column: source, axis (0/1/2: sliced along Z/Y/X;
                         3: a cube), z, y, x (block start in source voxels), scale (mean
                         downscale factor of the patch's axes)
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

import hashlib
import json
import os
from collections import Counter
from pathlib import Path
from typing import Any, Iterable, Mapping

import numpy as np

from ..base.atomic import write_json
from ..errors import CorpusError
from .settings import StoreSettings

__all__ = ["CorpusStore", "StoreWriter", "CodeHistogram", "open_corpus", "encode", "decode", "quantization_note", "INDEX_COLUMNS", "CUBE",
           "STORE_VERSION", "CORPUS_FORMAT", "upgrade_manifest"]

# The manifest says what it is the same way as an encoder file's: ``format`` and ``format_version``.
# Version 2: ``format`` added; ``voxel_size_um`` as in the encoder manifest (``source_range``,
# ``patch_range``, ``target``, ``unknown_sources``); ``modality`` per source and ``modalities`` /
# ``formats`` kept apart. Version 1 stores are read and upgraded in memory (upgrade_manifest).
STORE_VERSION = 2
CORPUS_FORMAT = "warmstart-corpus"
_READABLE = (1, 2)
CUBE = 3  # the index's axis code of a 3-D cube (no slicing axis)
INDEX_COLUMNS = {"source": "int32", "axis": "int8", "z": "int32", "y": "int32", "x": "int32", "scale": "float32"}


def upgrade_manifest(m: dict[str, Any]) -> dict[str, Any]:
    """A corpus manifest in the current version's layout (version 1 manifests are converted; the
    file on disk is left as it is).

    Examples
    --------
    >>> old = {"format_version": 1, "voxel_size_um": {"source_range": [1.0, 2.0], "patch": None, "unknown_sources": 0},
    ...        "modalities": ["CT", "tiff"], "sources": [
    ...     {"status": "ok", "format": "tiff", "meta": {}, "voxel_size_um": [2.0, 2.0, 2.0], "downscale_factors": [1, 2, 2]},
    ...     {"status": "ok", "format": "dicom", "meta": {"modality": "CT"}, "voxel_size_um": [1.0, 1.0, 1.0],
    ...      "downscale_factors": [1, 1, 1]}]}
    >>> new = upgrade_manifest(old)
    >>> new["format_version"], new["voxel_size_um"]["patch_range"], new["modalities"], new["formats"]
    (2, [1.0, 4.0], ['CT'], {'dicom': 1, 'tiff': 1})
    """
    if m.get("format_version") == STORE_VERSION:
        return m
    m = dict(m)
    sources = [dict(e) for e in m.get("sources", [])]
    for e in sources:
        if e.get("status") == "ok":
            e.setdefault("modality", (e.get("meta") or {}).get("modality"))
    ok = [e for e in sources if e.get("status") == "ok"]
    old = m.get("voxel_size_um", {})
    if "patches" in m:
        m["patches"] = {"spatial_dims": 2, **m["patches"]}
    m.update(format=CORPUS_FORMAT, format_version=STORE_VERSION, sources=sources,
             voxel_size_um=voxel_section(ok, old.get("patch"), old.get("unknown_sources", 0)),
             modalities=sorted({e["modality"] for e in ok if e.get("modality")}),
             formats=dict(sorted(Counter(e["format"] for e in ok).items())))
    return m


def voxel_section(ok_sources: Iterable[Mapping[str, Any]], target: float | None, unknown: int) -> dict[str, Any]:
    """In-plane voxel sizes (µm) of the sources and of their patches after resampling, as
    ``source_range`` / ``patch_range`` ([min, max] or None), the resampling ``target`` (µm or
    None) and the count of sources of unknown voxel size: the same fields in the corpus manifest
    and in the encoder manifest."""
    src, patch = [], []
    for s in ok_sources:
        for v, f in zip(s["voxel_size_um"][1:], s["downscale_factors"][1:]):
            if v is not None:
                src.append(float(v))
                patch.append(float(v) * float(f))
    rng = (lambda xs: [min(xs), max(xs)] if xs else None)
    return {"source_range": rng(src), "patch_range": rng(patch), "target": target, "unknown_sources": int(unknown)}


def encode(x: np.ndarray, encoding: Mapping[str, Any]) -> tuple[np.ndarray, dict[str, float]]:
    """Encode normalized float32 patches for storage.

    Parameters
    ----------
    x : ndarray
        Normalized values.
    encoding : dict
        ``{"dtype": "uint16", "uint16_range": [lo, hi]}`` or ``{"dtype": "float16"}``
        (``CorpusSettings.encoding()``).

    Returns
    -------
    codes : ndarray
        float16 or uint16.
    error : dict
        ``max_abs_error`` (measured on every 16th value: a sample, to keep encoding cheap) and
        ``clipped`` (values outside the code range, all counted).
    """
    x = np.asarray(x, dtype=np.float32)
    if x.size == 0:
        return x.astype(np.float16 if encoding["dtype"] == "float16" else np.uint16), {"max_abs_error": 0.0, "clipped": 0}
    sample = x.reshape(-1)[::16]
    if encoding["dtype"] == "float16":
        lo, hi = float(x.min()), float(x.max())
        clipped = 0
        if lo < -65504.0 or hi > 65504.0:  # beyond float16's range: clip rather than store inf
            clipped = int((np.abs(x) > 65504.0).sum())
            x = np.clip(x, -65504.0, 65504.0)
        codes = x.astype(np.float16)
        err = float(np.max(np.abs(codes.reshape(-1)[::16].astype(np.float32) - sample)))
        return codes, {"max_abs_error": err, "clipped": clipped}
    lo, hi = encoding["uint16_range"]
    scale = np.float32(65535.0 / (hi - lo))
    scaled = np.multiply(x, scale)
    scaled += np.float32(0.5 - lo * scale)  # +0.5 then truncation = round half up
    clipped = int(np.count_nonzero(scaled < 0.5)) + int(np.count_nonzero(scaled > 65535.5))
    np.clip(scaled, 0, 65535.0, out=scaled)
    codes = scaled.astype(np.uint16)
    back = decode(codes.reshape(-1)[::16], encoding)
    inside = (sample >= lo) & (sample <= hi)
    err = float(np.max(np.abs(back - sample)[inside], initial=0.0))
    return codes, {"max_abs_error": err, "clipped": clipped}


class CodeHistogram:
    """Exact statistics of stored values from a histogram of their 16-bit codes.

    Counting codes (``bincount`` over 65536 bins) is several times cheaper than statistics on the
    float values, and describes exactly what the store holds (after quantization).
    """

    def __init__(self) -> None:
        self.counts = np.zeros(65536, dtype=np.int64)

    def update(self, codes: np.ndarray) -> None:
        self.counts += np.bincount(np.ascontiguousarray(codes).view(np.uint16).ravel(), minlength=65536)

    def summary(self, encoding: Mapping[str, Any], lo: float, hi: float, bins: int = 256) -> dict[str, Any]:
        """``n``, ``sum``, ``sumsq``, ``below``/``above`` the range and ``bins`` counts over [lo, hi]."""
        used = np.flatnonzero(self.counts)
        codes = used.astype(np.uint16)
        if encoding["dtype"] == "float16":
            codes = codes.view(np.float16)
        v = decode(codes, encoding).astype(np.float64)
        c = self.counts[used]
        inside = (v >= lo) & (v <= hi)
        idx = np.minimum(((v[inside] - lo) * (bins / (hi - lo))).astype(np.int64), bins - 1)
        hist = np.bincount(idx, weights=c[inside], minlength=bins).astype(np.int64)
        return {"n": int(c.sum()), "sum": float(np.dot(c, v)), "sumsq": float(np.dot(c, v * v)),
                "below": int(c[v < lo].sum()), "above": int(c[v > hi].sum()), "range": [lo, hi], "counts": hist.tolist()}


def decode(codes: np.ndarray, encoding: Mapping[str, Any]) -> np.ndarray:
    """Decode stored patches to normalized float32."""
    if encoding["dtype"] == "float16":
        return np.asarray(codes, dtype=np.float32)
    lo, hi = encoding["uint16_range"]
    return (np.asarray(codes, dtype=np.float32) * np.float32((hi - lo) / 65535.0) + np.float32(lo)).astype(np.float32)


def quantization_note(encoding: Mapping[str, Any]) -> dict[str, Any]:
    """The stated (worst-case) quantization error of an encoding."""
    if encoding["dtype"] == "float16":
        return {"dtype": "float16", "bound": "relative error <= 2^-11 (half a float16 ulp); |x| > 65504 clipped"}
    lo, hi = encoding["uint16_range"]
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
        if self.manifest.get("format_version") not in _READABLE or self.manifest.get("format", CORPUS_FORMAT) != CORPUS_FORMAT:
            raise CorpusError(f"{self.path}: store format {self.manifest.get('format')!r} version "
                              f"{self.manifest.get('format_version')!r}; this warmstart reads {CORPUS_FORMAT} versions "
                              f"{', '.join(map(str, _READABLE))}")
        self.manifest = upgrade_manifest(self.manifest)
        root = zarr.open_group(str(self.path), mode="r")
        self.patches = root["patches"]
        self._index = root["index"]
        n = self.manifest["patches"]["count"]
        if self.patches.shape[0] != n:
            raise CorpusError(f"{self.path}: manifest lists {n} patches, the array holds {self.patches.shape[0]}")
        self._check_chunks()

    def _check_chunks(self) -> None:
        """Refuse a store with a missing chunk file (zarr would read it as the fill value: constant
        patches that would train silently); cheap: one directory listing."""
        from ..volumes.gaps import missing_chunks

        gaps = missing_chunks(self.patches, str(self.path / "patches"))
        if gaps is not None and gaps[0]:
            key, box = gaps[0][0]
            raise CorpusError(f"{self.path}: chunk file patches/{key} (patches {box[0][0]} to {box[0][1] - 1}) is "
                              "missing: the store is damaged; rebuild it (corpus build --fresh) or restore it from a copy")

    def unchecked_sources(self) -> list[str]:
        """Names of used sources without a recorded patch checksum (stores built by warmstart 0.1)."""
        return [e["name"] for e in self.manifest["sources"] if e.get("status") == "ok" and e.get("patches_sha256") is None]

    def verify(self) -> list[str]:
        """Recompute the sha256 of every source's stored patches against the manifest's.

        Returns
        -------
        list of str
            One message per source whose patches differ (empty when all match). Sources without a
            recorded checksum are skipped (see :meth:`unchecked_sources`).
        """
        problems = []
        for e in self.manifest["sources"]:
            a, b = e["patch_range"]
            want = e.get("patches_sha256")
            if e.get("status") != "ok" or want is None:
                continue
            h = hashlib.sha256()
            for i in range(a, b, 4096):
                h.update(memoryview(np.ascontiguousarray(self.patches[i:min(i + 4096, b)])).cast("B"))
            if h.hexdigest() != want:
                problems.append(f"{e['name']}: patches {a} to {b - 1} do not match their recorded sha256 (damaged)")
        return problems

    def __len__(self) -> int:
        return int(self.patches.shape[0])

    @property
    def encoding(self) -> dict[str, Any]:
        return self.manifest["patches"]["encoding"]

    @property
    def spatial_dims(self) -> int:
        """2 for (N, C, P, P) patches, 3 for (N, 1, P, P, P) cubes."""
        return int(self.manifest["patches"].get("spatial_dims", 2))

    def read(self, start: int = 0, stop: int | None = None) -> np.ndarray:
        """Patches ``start:stop`` as normalized float32 (N, C, P, P), or (N, 1, P, P, P) cubes."""
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
            # Settings added since an interrupted build began are compared at their defaults.
            old.get("settings", {}).get("read", {}).setdefault("modality", {})
            for key in ("settings", "sources", "shard", "archive_names"):
                if old.get(key) != build.get(key):
                    raise CorpusError(
                        f"{self.path}: exists and was started with different {key}; "
                        "use a new output folder, or --fresh to start over"
                    )
            self.root = zarr.open_group(str(self.path), mode="r+")
            self.patches = self.root["patches"]
        else:
            if self.path.exists() and not self.path.is_dir():
                raise CorpusError(f"{self.path}: is a file, not a folder; give a new folder for the corpus store")
            if self.path.exists() and any(self.path.iterdir()):
                raise CorpusError(f"{self.path}: exists and is not a corpus build; choose an empty or new folder")
            self.path.mkdir(parents=True, exist_ok=True)
            self.root = zarr.open_group(str(self.path), mode="w", zarr_format=3)
            from zarr.codecs import BloscCodec

            compressors = None if s.compression == "none" else BloscCodec(cname=s.compression, clevel=5, shuffle="shuffle")
            # Every chunk is written, even one that equals the fill value, so that a missing chunk
            # file always means damage (checked whenever the store is opened).
            self.patches = self.root.create_array("patches", shape=(0,) + patch_shape, dtype=dtype,
                                                  chunks=(s.chunk_patches,) + patch_shape, compressors=compressors,
                                                  config={"write_empty_chunks": True})
            self.journal_dir.mkdir(exist_ok=True)
            write_json(build_file, build)
        self.journal_dir.mkdir(exist_ok=True)
        self._digest = hashlib.sha256()  # of the stored codes appended since the last journalled source

    def records(self) -> list[dict[str, Any]]:
        """Journalled source records, by position."""
        out = [json.loads(p.read_text()) for p in sorted(self.journal_dir.glob("[0-9]*.json"))]
        return sorted(out, key=lambda r: r["position"])

    def recover(self) -> list[dict[str, Any]]:
        """Cut the patches back to the journalled ones; return the journalled records."""
        recs = self.records()
        self.truncate(max((r["stop"] for r in recs), default=0))
        (self.path / "manifest.json").unlink(missing_ok=True)
        return recs

    def add_patches(self, codes: np.ndarray | Iterable[np.ndarray]) -> int:
        """Append patches (an array, or an iterable of arrays to stream); return the new length."""
        stop = int(self.patches.shape[0])
        for part in ([codes] if isinstance(codes, np.ndarray) else codes):
            m = int(len(part))
            if m:
                part = np.ascontiguousarray(part, dtype=self.patches.dtype)
                self.patches.resize((stop + m,) + tuple(self.patches.shape[1:]))
                self.patches[stop:stop + m] = part
                self._digest.update(memoryview(part).cast("B"))
                stop += m
        return stop

    def truncate(self, n: int) -> None:
        """Cut the patches back to ``n`` (drops a source that failed half-way)."""
        if self.patches.shape[0] != n:
            self.patches.resize((n,) + tuple(self.patches.shape[1:]))
        self._digest = hashlib.sha256()

    def journal(self, record: dict[str, Any], columns: Mapping[str, np.ndarray], start: int) -> dict[str, Any]:
        """Journal a source whose patches are ``start:`` the current end: index rows, then record."""
        record = dict(record, start=int(start), stop=int(self.patches.shape[0]), patches_sha256=self._digest.hexdigest())
        self._digest = hashlib.sha256()
        stem = self.journal_dir / f"{record['position']:06d}"
        tmp = stem.with_name(f".{stem.name}.index.npz")
        with open(tmp, "wb") as fh:
            np.savez(fh, **{c: np.asarray(columns[c], dtype=t).reshape(-1) for c, t in INDEX_COLUMNS.items()})
        os.replace(tmp, stem.with_suffix(".index.npz"))
        write_json(stem.with_suffix(".json"), record)
        return record

    def append(self, codes: np.ndarray | Iterable[np.ndarray], columns: Mapping[str, np.ndarray],
               record: dict[str, Any]) -> dict[str, Any]:
        """Append one source's patches, then journal it."""
        start = int(self.patches.shape[0])
        self.add_patches(codes)
        return self.journal(record, columns, start)

    def finish_index(self) -> None:
        """Write the provenance index (one array per column) from the journal, in patch order.

        The rows travel with each source's journal record during the build and are written once
        here: a few large writes instead of several small ones per source.
        """
        parts = {c: [] for c in INDEX_COLUMNS}
        for r in self.records():
            with np.load(self.journal_dir / f"{r['position']:06d}.index.npz") as z:
                for c in INDEX_COLUMNS:
                    parts[c].append(z[c])
        n = int(self.patches.shape[0])
        group = self.root.create_group("index", overwrite=True)
        for c, t in INDEX_COLUMNS.items():
            col = np.concatenate(parts[c]) if parts[c] else np.empty(0, t)
            if len(col) != n:
                raise CorpusError(f"{self.path}: index column {c} has {len(col)} rows for {n} patches")
            arr = group.create_array(c, shape=(n,), dtype=t, chunks=(max(1, min(n, 1 << 20)),))
            if n:
                arr[:] = col.astype(t)
