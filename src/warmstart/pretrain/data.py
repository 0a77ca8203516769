"""Batches of patches from a corpus store, read chunk by chunk.

An epoch is planned as a list of patch indices (each patch once, or drawn with replacement so
that each source contributes a set share), grouped by zarr chunk. Chunks are visited in a random
order and each is read once, whole: no small random reads. Patches of ``mix_chunks`` chunks are
shuffled together before they are cut into batches. DataLoader workers and distributed ranks
take disjoint sets of chunks. With ``in_memory`` the decoded corpus is kept in RAM and the same
plan indexes it.
"""
from __future__ import annotations

import os
from typing import Any, Iterator, Mapping

import numpy as np
import torch
from torch.utils.data import IterableDataset, get_worker_info

from ..corpus.store import decode, open_corpus

__all__ = ["CorpusBatches", "epoch_plan"]


def epoch_plan(source_of: np.ndarray, n_per_epoch: int | None, weights: Mapping[int, float] | None,
               rng: np.random.Generator) -> np.ndarray:
    """Patch indices of one epoch.

    Parameters
    ----------
    source_of : (N,) int array
        Source id of every patch.
    n_per_epoch : int, optional
        Patches per epoch; default N.
    weights : mapping source id -> share, optional
        Each source's share of the epoch (normalized here); patches are drawn with replacement
        within a source. ``None``: every patch once, in random order.
    rng : numpy.random.Generator

    Returns
    -------
    (n,) int64 array
    """
    n_total = len(source_of)
    if weights is None:
        idx = rng.permutation(n_total)
        return idx if n_per_epoch is None else idx[:n_per_epoch]
    n = n_per_epoch or n_total
    sources = sorted(k for k in weights if weights[k] > 0)
    share = np.array([weights[k] for k in sources], dtype=float)
    share /= share.sum()
    counts = rng.multinomial(n, share)
    parts = []
    for src, c in zip(sources, counts):
        members = np.flatnonzero(source_of == src)
        if len(members) == 0:
            raise ValueError(f"source weight given for source {src}, which has no patches")
        parts.append(rng.choice(members, size=c, replace=True))
    return rng.permutation(np.concatenate(parts)) if parts else np.empty(0, np.int64)


class CorpusBatches(IterableDataset):
    """Iterable over batches ``(B, C, P, P)`` float32 tensors of normalized patches.

    Use with ``DataLoader(ds, batch_size=None, num_workers=k)``; call :meth:`set_epoch` before each
    epoch so that every rank and worker draws the same plan.

    Parameters
    ----------
    corpus : path
        A finished corpus store.
    batch_size : int
    seed : int
    in_memory : bool or "auto"
        Keep the decoded corpus in RAM; "auto" does so when it takes under ``memory_limit_gb``.
    source_weights : mapping source id (position) -> share, optional
    n_per_epoch : int, optional
    mix_chunks : int
        Chunks whose patches are shuffled together.
    drop_last : bool
    rank, world_size : int, optional
        Distributed rank; default from ``torch.distributed`` when initialized.
    num_workers : int
        The DataLoader's workers (0 or more): ``len()`` counts the batches the epoch really has,
        since each worker drops its own partial batch.
    """

    def __init__(self, corpus: str | os.PathLike[str], batch_size: int, seed: int = 0, in_memory: bool | str = "auto",
                 source_weights: Mapping[int, float] | None = None, n_per_epoch: int | None = None, mix_chunks: int = 4,
                 drop_last: bool = True, memory_limit_gb: float = 4.0, rank: int | None = None,
                 world_size: int | None = None, num_workers: int = 0) -> None:
        super().__init__()
        store = open_corpus(corpus)
        self.path = str(store.path)
        self.encoding = store.encoding
        self.shape = tuple(store.patches.shape)
        self.chunk = int(store.patches.chunks[0])
        self.source_of = store.index()["source"].astype(np.int64)
        self.batch_size = int(batch_size)
        self.seed = int(seed)
        self.weights = dict(source_weights) if source_weights else None
        self.n_per_epoch = n_per_epoch
        self.mix_chunks = max(1, int(mix_chunks))
        self.drop_last = drop_last
        self.num_workers = int(num_workers)
        self.epoch = 0
        self.start_batch = 0  # batches of this epoch already consumed (set when a run resumes)
        self._rank, self._world = rank, world_size
        nbytes = int(np.prod(self.shape)) * 2  # kept as the stored 16-bit codes
        self.in_memory = nbytes < memory_limit_gb * 1e9 if in_memory == "auto" else bool(in_memory)
        self._codes: np.ndarray | None = None
        self._patches = None  # opened lazily in each worker process

    def set_epoch(self, epoch: int) -> None:
        self.epoch = int(epoch)

    def __len__(self) -> int:
        """Batches per epoch on this rank (with ``drop_last``: exact)."""
        n = self.n_per_epoch or len(self.source_of)
        workers = max(1, self.num_workers)
        per_consumer = n // (self._world_size() * workers)
        if self.drop_last:
            return workers * (per_consumer // self.batch_size)
        return workers * -(-per_consumer // self.batch_size)

    def _world_size(self) -> int:
        if self._world is not None:
            return self._world
        dist = torch.distributed
        return dist.get_world_size() if dist.is_available() and dist.is_initialized() else 1

    def _rank_id(self) -> int:
        if self._rank is not None:
            return self._rank
        dist = torch.distributed
        return dist.get_rank() if dist.is_available() and dist.is_initialized() else 0

    def _array(self) -> Any:
        if self._patches is None:
            import zarr

            self._patches = zarr.open_group(self.path, mode="r")["patches"]
        return self._patches

    def _read_chunk(self, c: int) -> np.ndarray:
        lo, hi = c * self.chunk, min((c + 1) * self.chunk, self.shape[0])
        if self.in_memory:
            if self._codes is None:
                self._codes = np.asarray(self._array()[:])
            return self._codes[lo:hi]
        return np.asarray(self._array()[lo:hi])

    def chunk_plan(self, worker: int | None = None, workers: int | None = None) -> list[tuple[int, np.ndarray]]:
        """This rank's and worker's (chunk, patch indices) list for the current epoch.

        The epoch's indices are ordered by a random permutation of the chunks (keeping their
        random order within a chunk) and cut into equal contiguous slices, one per rank and
        worker: every consumer gets the same number of patches (distributed training needs
        equal step counts) and each chunk is read about once.
        """
        rng = np.random.default_rng([self.seed, self.epoch])
        idx = epoch_plan(self.source_of, self.n_per_epoch, self.weights, rng)
        if len(idx) == 0:
            return []
        chunks = idx // self.chunk
        rank_of_chunk = rng.permutation(int(chunks.max()) + 1)
        idx = idx[np.argsort(rank_of_chunk[chunks], kind="stable")]
        if worker is None or workers is None:
            info = get_worker_info()
            worker, workers = (info.id, info.num_workers) if info is not None else (0, 1)
        consumer = self._rank_id() * workers + worker
        per = len(idx) // (self._world_size() * workers)
        mine = idx[consumer * per:(consumer + 1) * per]
        c = mine // self.chunk
        cuts = np.flatnonzero(np.diff(c)) + 1
        return [(int(g[0] // self.chunk), g) for g in np.split(mine, cuts) if len(g)]

    def __iter__(self) -> Iterator[torch.Tensor]:
        info = get_worker_info()
        wid, workers = (info.id, info.num_workers) if info is not None else (0, 1)
        # A DataLoader takes batch t from worker t mod W, starting with worker 0 on every new
        # iterator. Overall batch b belongs to the plan of worker b mod W, as its (b div W)-th
        # batch. When an epoch resumes after start_batch batches, worker w must therefore make
        # batches start_batch + w + kW: the plan of worker (w + start) mod W, minus its first
        # (w + start) div W batches.
        plan_of = (wid + self.start_batch) % workers
        skip = (wid + self.start_batch) // workers
        rng = np.random.default_rng([self.seed, self.epoch, self._rank_id(), 1 + plan_of])
        for i, batch in enumerate(self._batches(rng, plan_of, workers)):
            if i >= skip:
                yield batch

    def _batches(self, rng: np.random.Generator, worker: int, workers: int) -> Iterator[torch.Tensor]:
        plan = self.chunk_plan(worker, workers)
        carry = np.empty((0,) + self.shape[1:], dtype=np.float32)
        for g in range(0, len(plan), self.mix_chunks):
            parts = []
            for c, members in plan[g:g + self.mix_chunks]:
                block = self._read_chunk(c)  # one whole chunk
                parts.append(block[members - c * self.chunk])
            mixed = decode(np.concatenate(parts), self.encoding)
            mixed = np.concatenate([carry, mixed[rng.permutation(len(mixed))]])
            n_full = len(mixed) // self.batch_size * self.batch_size
            for b in range(0, n_full, self.batch_size):
                yield torch.from_numpy(mixed[b:b + self.batch_size])
            carry = mixed[n_full:]
        if len(carry) and not self.drop_last:
            yield torch.from_numpy(carry)
