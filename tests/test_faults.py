"""The standing fault suite: concurrent writers, damaged inputs and bad output paths.

Each case ends in a clean result or a named error (never a traceback, a hang or a silent wrong
result). Fixtures are generated in the tests.
"""
from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from conftest import textured
from warmstart.base.lock import OutputBusyError, lock_path, output_lock
from warmstart.corpus.build import build_corpus
from warmstart.corpus.settings import CorpusSettings, SamplingSettings

TINY = CorpusSettings(sampling=SamplingSettings(patch_size=32, max_per_source=20))


@pytest.fixture
def archive(tmp_path):
    root = tmp_path / "archive"
    root.mkdir()
    np.save(root / "v.npy", textured(shape=(16, 64, 64)))
    return root


# --- one writer per output -------------------------------------------------------------------
def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_a_second_build_into_a_live_build_is_refused_with_the_holder(archive, tmp_path, capsys):
    from warmstart.cli import main

    out = tmp_path / "c.zarr"
    with output_lock(out, "corpus build"):
        with pytest.raises(OutputBusyError, match=r"corpus build \(process \d+ on .*\) is writing here"):
            build_corpus(archive, out, TINY, report=False, progress=False)
        assert main(["-q", "corpus", "build", str(archive), "-o", str(out)]) == 1
        assert "is writing here" in capsys.readouterr().err
    assert not out.exists()  # the refused build wrote nothing
    assert build_corpus(archive, out, TINY, report=False, progress=False).exit_code == 0
    assert not lock_path(out).exists()  # released on exit


def test_a_stale_lock_of_a_dead_process_is_taken_over(archive, tmp_path):
    import socket

    out = tmp_path / "c.zarr"
    lock_path(out).write_text(json.dumps({"pid": _dead_pid(), "host": socket.gethostname(), "what": "corpus build"}))
    assert build_corpus(archive, out, TINY, report=False, progress=False).exit_code == 0


def test_a_lock_from_another_host_is_respected_and_says_how_to_clear_it(archive, tmp_path):
    out = tmp_path / "c.zarr"
    lock_path(out).write_text(json.dumps({"pid": 1, "host": "some-other-node", "what": "corpus build"}))
    with pytest.raises(OutputBusyError, match="some-other-node.*delete"):
        build_corpus(archive, out, TINY, report=False, progress=False)


@pytest.mark.parametrize("command", ["pretrain", "bench", "merge"])
def test_pretrain_bench_and_merge_outputs_are_locked_too(tmp_path, command, capsys):
    from warmstart.cli import main

    out = tmp_path / "out"
    argv = {"pretrain": ["pretrain", str(tmp_path / "c.zarr"), "-o", str(out)],
            "bench": ["bench", str(tmp_path / "labelled"), "-o", str(out)],
            "merge": ["corpus", "merge", str(tmp_path / "a.zarr"), "-o", str(out)]}[command]
    if command != "merge":
        pytest.importorskip("torch")
    with output_lock(out, "something else"):
        assert main(["-q", *argv]) == 1
    assert "something else (process" in capsys.readouterr().err
