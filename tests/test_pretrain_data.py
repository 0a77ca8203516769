"""Corpus batches: every patch once per epoch, whole-chunk reads, equal shares for ranks and workers."""
from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from warmstart.corpus.build import build_corpus  # noqa: E402
from warmstart.corpus.settings import CorpusSettings, SamplingSettings, StoreSettings  # noqa: E402
from warmstart.corpus.store import open_corpus  # noqa: E402
from warmstart.pretrain.data import CorpusBatches, epoch_plan  # noqa: E402


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    from conftest import textured

    root = tmp_path_factory.mktemp("data")
    (root / "a").mkdir()
    for i, n in enumerate((12, 20, 28)):
        np.save(root / "a" / f"v{i}.npy", textured(shape=(n, 64, 64), seed=i))
    s = CorpusSettings(sampling=SamplingSettings(patch_size=16, slice_stride=1, max_per_source=10_000),
                       store=StoreSettings(chunk_patches=32))
    return build_corpus(root / "a", root / "c.zarr", s, report=False, progress=False).path


def test_every_patch_once_per_epoch_by_whole_chunks(corpus, monkeypatch):
    store = open_corpus(corpus)
    ds = CorpusBatches(corpus, batch_size=10, seed=3, in_memory=False, drop_last=False)
    reads = []
    real = ds._read_chunk
    monkeypatch.setattr(ds, "_read_chunk", lambda c: (reads.append(c), real(c))[1])
    batches = list(ds)
    got = torch.cat(batches).numpy()
    assert len(got) == len(store)
    np.testing.assert_allclose(np.sort(got.reshape(len(got), -1).sum(1)), np.sort(store.read().reshape(len(store), -1).sum(1)), rtol=1e-6)
    n_chunks = -(-len(store) // 32)
    assert sorted(reads) == list(range(n_chunks))  # each chunk read once, whole


def test_epochs_differ_and_repeat_with_the_seed(corpus):
    a = CorpusBatches(corpus, batch_size=16, seed=1)
    first = torch.cat(list(a))
    again = torch.cat(list(CorpusBatches(corpus, batch_size=16, seed=1)))
    a.set_epoch(1)
    second = torch.cat(list(a))
    assert torch.equal(first, again) and not torch.equal(first, second)


def test_in_memory_equals_streaming(corpus):
    mem = torch.cat(list(CorpusBatches(corpus, batch_size=8, seed=2, in_memory=True)))
    disk = torch.cat(list(CorpusBatches(corpus, batch_size=8, seed=2, in_memory=False)))
    assert torch.equal(mem, disk)


def test_ranks_get_equal_disjoint_shares(corpus):
    plans = [CorpusBatches(corpus, batch_size=8, seed=0, rank=r, world_size=3).chunk_plan() for r in range(3)]
    sets = [np.concatenate([m for _, m in p]) for p in plans]
    assert len({len(s) for s in sets}) == 1
    assert not (set(sets[0]) & set(sets[1])) and not (set(sets[1]) & set(sets[2]))
    counts = [len(list(CorpusBatches(corpus, batch_size=8, seed=0, rank=r, world_size=3))) for r in range(3)]
    assert len(set(counts)) == 1  # distributed training needs equal step counts


def test_dataloader_workers_split_the_epoch(corpus):
    from torch.utils.data import DataLoader

    ds = CorpusBatches(corpus, batch_size=8, seed=0, in_memory=False)
    one = torch.cat(list(DataLoader(ds, batch_size=None, num_workers=0)))
    two = torch.cat(list(DataLoader(ds, batch_size=None, num_workers=2)))
    assert abs(len(one) - len(two)) <= 2 * 8  # each worker drops at most one partial batch
    s1 = set(map(float, one.sum(dim=(1, 2, 3))))
    s2 = list(map(float, two.sum(dim=(1, 2, 3))))
    assert len(set(s2)) == len(s2) and set(s2) <= s1  # no patch twice, none invented


def test_source_weights_set_each_share():
    rng = np.random.default_rng(0)
    source_of = np.repeat([0, 1, 2], [900, 90, 10])
    idx = epoch_plan(source_of, 20_000, {0: 1, 1: 1, 2: 2}, rng)
    shares = np.bincount(source_of[idx], minlength=3) / len(idx)
    np.testing.assert_allclose(shares, [0.25, 0.25, 0.5], atol=0.015)
    with pytest.raises(ValueError, match="no patches"):
        epoch_plan(source_of, 10, {7: 1.0}, rng)
