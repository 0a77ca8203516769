"""Build a corpus store from an archive: discover, normalize, sample, filter, store, report.

Each source is processed on its own (in a worker process when ``workers > 1``) into a staging
file; the main process appends finished sources to the store strictly in the canonical source
order (sorted names), so the store is the same whatever the number of workers, whether the
build was interrupted and resumed, or built as shards and merged. A source's patches depend only
on the settings, the seed and the source's name (see :func:`~warmstart.corpus.sampling.source_seed`).
"""
from __future__ import annotations

import math
import os
import shutil
import time
import warnings
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from dataclasses import dataclass, field
from multiprocessing import get_context
from pathlib import Path
from typing import Any

import numpy as np

from .. import __version__
from ..base.atomic import write_json
from ..base.lock import locks_output
from ..errors import CorpusError, VolumeReadError
from ..intensity import fit_intensity
from ..volumes import Candidate, describe_failure, discover, open_volume
from .manifest import build_manifest
from .sampling import PatchFilter, background_level, downscale_factors, extract_patches, plan_patches, source_seed
from .settings import CorpusSettings
from .store import CUBE, INDEX_COLUMNS, CodeHistogram, StoreWriter, encode

__all__ = ["build_corpus", "BuildResult", "process_source", "source_parts", "merge_parts", "parse_shard", "EXIT_SKIPPED"]

#: Exit status of a build (CLI) that finished but skipped unreadable sources.
EXIT_SKIPPED = 3


@dataclass
class BuildResult:
    """What a build produced.

    Attributes
    ----------
    path : Path
        The corpus store.
    n_patches : int
    n_sources : int
        Sources this build (or shard) covered.
    failed : list of (name, reason)
        Sources skipped, with the reason.
    ignored : list of (path, reason)
        Files in the archive that are not images.
    seconds : float
    resumed : int
        Sources taken over from an interrupted earlier run.
    """

    path: Path
    n_patches: int
    n_sources: int
    failed: list[tuple[str, str]] = field(default_factory=list)
    ignored: list[tuple[str, str]] = field(default_factory=list)
    seconds: float = 0.0
    resumed: int = 0

    @property
    def exit_code(self) -> int:
        return EXIT_SKIPPED if self.failed else 0

    def to_dict(self) -> dict[str, Any]:
        return {"path": str(self.path), "n_patches": self.n_patches, "n_sources": self.n_sources,
                "failed": [{"name": n, "reason": r} for n, r in self.failed],
                "ignored": [{"path": p, "reason": r} for p, r in self.ignored],
                "seconds": round(self.seconds, 3), "resumed": self.resumed, "exit_code": self.exit_code}


def parse_shard(text: str | None) -> tuple[int, int] | None:
    """Parse ``"i/n"`` (0 <= i < n)."""
    if text is None:
        return None
    try:
        i, n = (int(t) for t in str(text).split("/"))
    except ValueError as err:
        raise CorpusError(f"shard must look like i/n (e.g. 0/4), got {text!r}") from err
    if not 0 <= i < n:
        raise CorpusError(f"shard {text}: need 0 <= i < n")
    return i, n


def process_source(job: dict[str, Any]) -> dict[str, Any]:
    """Process one source into a staging file (runs in a worker process).

    Parameters
    ----------
    job : dict
        ``candidate`` (Candidate), ``position`` (int), ``settings`` (CorpusSettings as dict),
        ``staging`` (folder), optionally ``part`` and ``n_parts`` (this job does Z slab ``part``
        of ``n_parts``; see :func:`source_parts`).

    Returns
    -------
    dict
        The journal record, plus ``columns`` (index rows) and ``staging_file`` for the writer.
        Failures are returned, not raised: ``status = "failed"`` with the reason.
    """
    cand: Candidate = job["candidate"]
    s = CorpusSettings.from_dict(job["settings"])
    pos = int(job["position"])
    part, n_parts = int(job.get("part", 0)), int(job.get("n_parts", 1))
    staging = Path(job["staging"]) / f"{pos:06d}-{part:04d}.codes"
    t0 = time.perf_counter()
    rec: dict[str, Any] = {"position": pos, "name": cand.name, "path": cand.path, "format": cand.format,
                           "status": "ok", "reason": None, "warnings": []}
    p = s.sampling.patch_size
    cols: dict[str, np.ndarray] = {}
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            vol = open_volume(cand, rgb=s.read.rgb, channel=s.read.channel,
                              target_voxel_um=s.sampling.target_voxel_um, voxel_size_um=s.read.voxel_size_um)
            with vol:
                rec["format"] = vol.source.format  # e.g. "ome-zarr" for a zarr folder with multiscales
                ref = fit_intensity(vol, s.intensity)
                factors, notes = downscale_factors(vol.voxel_size_um, s.sampling, vol.shape)
                rng = np.random.default_rng(source_seed(s.sampling.seed, cand.name))
                plan = plan_patches(vol.shape, factors, s.sampling, rng)
                if len(plan) == 0:
                    raise VolumeReadError(
                        f"{cand.path}: volume {vol.shape} is smaller than one patch "
                        f"({p} px at downscale factors {[round(f, 3) for f in factors]})"
                    )
                if n_parts > 1:
                    plan = plan.part(part, n_parts, vol.shape[0])
                counts, stats, qerr, cols = _sample_volume(vol, ref, plan, factors, s, pos, staging)
            rec.update(volume=vol.describe(), reference=ref.to_dict(), factors=list(factors),
                       counts=counts, quantization=qerr, stats=stats)
            rec["warnings"] = notes + [str(w.message) for w in caught]
            if ref.stats["n_nonfinite"]:
                rec["warnings"].append(f"{ref.stats['n_nonfinite']} NaN/Inf voxels in the intensity sample (excluded)")
    except Exception as err:  # a reader library's unexpected error must not stop the whole build
        rec.update(status="failed", reason=describe_failure(err, cand.path))
    if rec["status"] != "ok":
        staging.unlink(missing_ok=True)
        rec["columns"] = {c: np.empty(0) for c in INDEX_COLUMNS}
    else:
        rec["columns"] = cols
        rec["staging_file"] = str(staging)
    rec["part"], rec["n_parts"] = part, n_parts
    rec["seconds"] = round(time.perf_counter() - t0, 3)
    return rec


def source_parts(cand: Candidate, part_mb: float) -> int:
    """How many Z slabs a source is processed in: its size on disk over ``part_mb`` megabytes."""
    p = Path(cand.path)
    files = cand.files or ((p,) if p.is_file() else tuple(q for q in p.rglob("*") if q.is_file()))
    size = sum(os.path.getsize(f) for f in files)
    return max(1, math.ceil(size / (part_mb * 1e6)))


_BASE_KEYS = ("position", "name", "path", "format", "status", "reason", "warnings")


def merge_parts(parts: list[dict[str, Any]]) -> dict[str, Any]:
    """One journal record from the records of a source's parts (counts and statistics add up)."""
    first = parts[0]
    bad = [r for r in parts if r["status"] != "ok"]
    seconds = round(sum(r["seconds"] for r in parts), 3)
    if bad:
        return {**{k: first[k] for k in _BASE_KEYS}, "status": "failed", "reason": bad[0]["reason"], "seconds": seconds}
    rec = {k: v for k, v in first.items() if k not in ("columns", "staging_file", "part", "n_parts")}
    st = [r["stats"] for r in parts]
    rec.update(
        counts={k: sum(r["counts"][k] for r in parts) for k in first["counts"]},
        stats={**{k: sum(x[k] for x in st) for k in ("n", "sum", "sumsq", "below", "above")}, "range": st[0]["range"],
               "counts": np.sum([x["counts"] for x in st], axis=0).astype(int).tolist()},
        quantization={"max_abs_error": max(r["quantization"]["max_abs_error"] for r in parts),
                      "clipped": sum(r["quantization"]["clipped"] for r in parts)},
        warnings=list(dict.fromkeys(w for r in parts for w in r["warnings"])),
        seconds=seconds, parts=len(parts),
    )
    return rec


def _sample_volume(vol: Any, ref: Any, plan: Any, factors: tuple[float, float, float], s: CorpusSettings,
                   pos: int, staging: Path) -> tuple[dict[str, int], dict[str, Any], dict[str, Any], dict[str, np.ndarray]]:
    """Extract, filter and encode one volume's planned patches into ``staging``.

    Returns the filter counts, the statistics of the stored codes, the quantization error and
    the index columns of the kept patches.
    """
    k, p = s.sampling.channels, s.sampling.patch_size
    cubes = s.sampling.spatial_dims == 3
    filt = PatchFilter(s.filters, background_level(ref, s.filters))
    stats = CodeHistogram()
    enc = s.encoding()
    qerr = {"max_abs_error": 0.0, "clipped": 0}
    cols: dict[str, list[np.ndarray]] = {c: [] for c in INDEX_COLUMNS}
    # in-plane downscale factor of a patch sliced along Z, Y, X; the mean of all three for a cube
    inplane = np.array([(factors[1] + factors[2]) / 2, (factors[0] + factors[2]) / 2, (factors[0] + factors[1]) / 2])
    if cubes:
        inplane[0] = sum(factors) / 3
    # One region read of b source bytes holds b / itemsize voxels, and working on it costs per voxel:
    # the region and the one read ahead (2 x itemsize), the float32 patches, the kept copy and the
    # codes (about 14 bytes). The region budget keeps that sum within memory_mb (cubes fill their
    # regions; thin 2-D regions rarely do).
    itemsize = vol.dtype.itemsize
    budget = s.memory_mb * 2**20 * itemsize // (2 * itemsize + 14)
    with open(staging, "wb") as fh:
        for patches, idx in extract_patches(vol.read, vol.shape, itemsize, plan, (p, p, p) if cubes else (k, p, p),
                                            ref.apply, filt, budget):
            codes, err = encode(patches, enc)
            fh.write(codes.tobytes())
            stats.update(codes)
            qerr = {"max_abs_error": max(qerr["max_abs_error"], err["max_abs_error"]),
                    "clipped": qerr["clipped"] + err["clipped"]}
            axis, start = plan.axis[idx], plan.start[idx]
            for c, values in (("source", np.full(len(idx), pos)), ("axis", np.full(len(idx), CUBE) if cubes else axis),
                              ("z", start[:, 0]), ("y", start[:, 1]), ("x", start[:, 2]), ("scale", inplane[axis])):
                cols[c].append(values)
    columns = {c: (np.concatenate(v) if v else np.empty(0)) for c, v in cols.items()}
    return filt.counts.to_dict(), stats.summary(enc, *s.histogram_range()), qerr, columns


def _prepare_output(out: Path, fresh: bool) -> None:
    if fresh and out.exists():
        if not (out / "build.json").exists():
            raise CorpusError(f"{out}: --fresh only removes a corpus store, and this folder is not one")
        shutil.rmtree(out)


@locks_output("corpus build")
def build_corpus(
    archive: str | os.PathLike[str],
    out: str | os.PathLike[str],
    settings: CorpusSettings | None = None,
    *,
    shard: tuple[int, int] | str | None = None,
    fresh: bool = False,
    report: bool = True,
    progress: bool = True,
) -> BuildResult:
    """Build (or resume building) a corpus store from an archive.

    Parameters
    ----------
    archive : path
        Folder of volumes in any readable format (see :func:`warmstart.volumes.discover`).
    out : path
        The store folder. If it holds an interrupted build with the same settings, the build
        resumes; a finished or foreign folder is refused.
    settings : CorpusSettings, optional
    shard : (i, n) or "i/n", optional
        Build only sources whose canonical position is ``i`` modulo ``n``; merge shards with
        :func:`warmstart.corpus.merge.merge_corpora`.
    fresh : bool
        Remove an existing store at ``out`` first.
    report : bool
        Write ``report/`` at the end.
    progress : bool
        Show a progress bar on stderr.

    Returns
    -------
    BuildResult
        ``exit_code`` is :data:`EXIT_SKIPPED` when some sources were skipped.
    """
    from ..base.progress import progress_bar

    t0 = time.perf_counter()
    s = settings or CorpusSettings()
    out = Path(out)
    shard = parse_shard(shard) if isinstance(shard, str) else shard
    candidates, ignored = discover(archive)
    if not candidates:
        raise CorpusError(f"{archive}: no volume found ({len(ignored)} other files ignored)")
    names = [c.name for c in candidates]
    chosen = [i for i in range(len(candidates)) if shard is None or i % shard[1] == shard[0]]
    build = {"format_version": 1, "warmstart_version": __version__, "archive": str(Path(archive).absolute()),
             "archive_names": names, "sources": chosen, "shard": list(shard) if shard else None,
             "settings": s.identity(), "ignored": [{"path": i.path, "reason": i.reason} for i in ignored]}
    _prepare_output(out, fresh)
    if (out / "manifest.json").exists():
        raise CorpusError(f"{out}: a finished corpus is already there; use --fresh to rebuild or a new folder")
    shape = s.sampling.patch_shape
    writer = StoreWriter(out, build, s.store, shape)
    done = writer.recover()
    if [r["position"] for r in done] != chosen[: len(done)]:
        raise CorpusError(f"{out}: journal does not match the source list; rebuild with --fresh")
    remaining = chosen[len(done):]
    staging = out / "staging"
    shutil.rmtree(staging, ignore_errors=True)
    staging.mkdir()
    jobs = []
    for i in remaining:
        n = source_parts(candidates[i], s.part_mb)
        jobs += [{"candidate": candidates[i], "position": i, "part": j, "n_parts": n, "settings": s.to_dict(),
                  "staging": str(staging)} for j in range(n)]
    bar = progress_bar(total=len(chosen), initial=len(done), desc="corpus: sources", unit="src", disable=not progress, leave=False)
    code_dtype = np.dtype(np.float16 if s.store.dtype == "float16" else np.uint16)
    # Staged patches are copied into the store in pieces of at most 8 chunks and 32 MB (a cube of
    # 48 voxels is 27x a 64 px patch: a count alone would not bound the memory).
    per_read = max(1, min(8 * s.store.chunk_patches, (32 << 20) // (int(np.prod(shape)) * code_dtype.itemsize)))
    assembler = _SourceAssembler(writer, code_dtype, shape, per_read)
    n_patches = sum(r["stop"] - r["start"] for r in done)

    def commit(rec: dict[str, Any]) -> None:
        nonlocal n_patches
        journalled = assembler.add(rec)
        if journalled is not None:
            n_patches += journalled["stop"] - journalled["start"]
            bar.update(1)
            bar.set_postfix(patches=n_patches)

    if s.workers == 1 or len(jobs) <= 1:
        for job in jobs:
            commit(process_source(job))
    else:
        _run_parallel(jobs, s.workers, commit)
    bar.close()
    writer.finish_index()
    records = writer.records()
    manifest = build_manifest(build, records, s, writer.patches.shape)
    if manifest["patches"]["count"] == 0:  # an empty corpus is never finished: nothing could train on it
        c = manifest["counts"]
        raise CorpusError(
            f"{out}: no patch was kept from {c['sources_ok']} usable source(s) ({c['planned']} planned; dropped: "
            f"{c['low_variance']} low variance, {c['background']} background, {c['duplicate']} near-duplicate, "
            f"{c['nonfinite']} non-finite; {c['sources_failed']} source(s) skipped): relax corpus.filters or sample "
            "more (corpus.sampling), then rerun"
            + "".join([f"\n  skipped {r['name']}: {r['reason']}" for r in records if r["status"] != "ok"][:5]))
    write_json(out / "manifest.json", manifest)  # last: its presence marks the store finished
    shutil.rmtree(staging, ignore_errors=True)
    if report:
        from .report import write_report

        write_report(out, progress=progress)
    failed = [(r["name"], r["reason"]) for r in records if r["status"] != "ok"]
    return BuildResult(out, manifest["patches"]["count"], len(chosen), failed,
                       [(i.path, i.reason) for i in ignored], time.perf_counter() - t0, len(done))


class _SourceAssembler:
    """Commits part records in job order: appends each part's patches as it comes, journals the
    source after its last part, and cuts a source back out if one of its parts failed."""

    def __init__(self, writer: StoreWriter, dtype: np.dtype, shape: tuple[int, int, int], per_read: int) -> None:
        self.writer, self.dtype, self.shape, self.per_read = writer, dtype, shape, per_read
        self.parts: list[dict[str, Any]] = []
        self.start = 0

    def add(self, rec: dict[str, Any]) -> dict[str, Any] | None:
        if not self.parts:
            self.start = int(self.writer.patches.shape[0])
        sfile = rec.pop("staging_file", None)
        if sfile:
            if all(r["status"] == "ok" for r in self.parts):
                self.writer.add_patches(_staged_parts(sfile, self.dtype, self.shape, self.per_read))
            os.unlink(sfile)
        self.parts.append(rec)
        if len(self.parts) < int(rec.get("n_parts", 1)):
            return None
        merged = merge_parts(self.parts)
        columns = {c: np.concatenate([r["columns"][c] for r in self.parts]) for c in INDEX_COLUMNS}
        if merged["status"] != "ok":
            self.writer.truncate(self.start)
            columns = {c: np.empty(0) for c in INDEX_COLUMNS}
        self.parts = []
        return self.writer.journal(merged, columns, self.start)


def _staged_parts(path: str, dtype: np.dtype, shape: tuple[int, int, int], per_part: int):
    """Read a staging file in pieces of ``per_part`` patches (memory stays bounded for any source)."""
    nbytes = int(np.prod(shape)) * dtype.itemsize
    with open(path, "rb") as fh:
        while True:
            buf = fh.read(per_part * nbytes)
            if not buf:
                return
            yield np.frombuffer(buf, dtype=dtype).reshape((-1,) + shape)


def _die_with_parent(main_pid: int) -> None:
    """In a worker process: exit when the build's main process dies, even by SIGKILL.

    Workers are forked by the forkserver, not by the main process, so Linux's PR_SET_PDEATHSIG
    (which this sets too) only covers the forkserver; a daemon thread watches the main process
    and, once it is gone, ends the forkserver (its other workers then get their signal) and itself.
    """
    import ctypes
    import signal
    import sys
    import threading

    if sys.platform.startswith("linux"):
        try:
            ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, int(signal.SIGTERM))  # 1 = PR_SET_PDEATHSIG
        except OSError:
            pass

    def watch() -> None:
        while True:
            time.sleep(0.5)
            try:
                os.kill(main_pid, 0)
            except ProcessLookupError:
                parent = os.getppid()
                if parent not in (1, main_pid):
                    try:
                        os.kill(parent, signal.SIGTERM)
                    except OSError:
                        pass
                os._exit(1)
            except PermissionError:
                pass

    threading.Thread(target=watch, daemon=True, name="warmstart-parent-watch").start()


def _run_parallel(jobs: list[dict[str, Any]], workers: int, commit: Any) -> None:
    """Run jobs in worker processes; commit results in job order, keeping few in flight."""
    # Not fork: zarr runs an event-loop thread in this process, and forking a threaded process can
    # deadlock. A forkserver that has imported the build code forks workers that start at once.
    ctx = get_context("forkserver")
    ctx.set_forkserver_preload(["warmstart.corpus.build"])
    pending: dict[int, Future[dict[str, Any]]] = {}
    ready: dict[int, dict[str, Any]] = {}
    nxt = 0  # next job to submit
    want = 0  # next job to commit
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx, initializer=_die_with_parent,
                             initargs=(os.getpid(),)) as pool:
        while want < len(jobs):
            while nxt < len(jobs) and len(pending) + len(ready) < 2 * workers:
                pending[nxt] = pool.submit(process_source, jobs[nxt])
                nxt += 1
            done, _ = wait(list(pending.values()), return_when=FIRST_COMPLETED)
            for i in [i for i, f in pending.items() if f in done]:
                ready[i] = pending.pop(i).result()
            while want in ready:
                commit(ready.pop(want))
                want += 1
