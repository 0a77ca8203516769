"""How a CPU run picks its thread count and its precision."""
from __future__ import annotations

from pathlib import Path

import pytest

from warmstart.base.cores import physical_cores, quota_cores, usable_cores


def _sysfs(root: Path, siblings: dict[int, str]) -> Path:
    for cpu, group in siblings.items():
        topo = root / f"cpu{cpu}" / "topology"
        topo.mkdir(parents=True)
        (topo / "core_cpus_list").write_text(group + "\n")
    return root


def test_smt_siblings_count_as_one_core(tmp_path):
    # Linux sysfs layout (Documentation/admin-guide/cputopology.rst): core_cpus_list names the
    # logical CPUs of one physical core; 4 logical CPUs on 2 cores with two threads each.
    sysfs = _sysfs(tmp_path, {0: "0,2", 1: "1,3", 2: "0,2", 3: "1,3"})
    assert physical_cores([0, 1, 2, 3], sysfs) == 2
    assert physical_cores([0, 2], sysfs) == 1  # pinned to both threads of one core
    assert physical_cores([0, 1], sysfs) == 2


def test_older_kernels_name_siblings_thread_siblings_list(tmp_path):
    for cpu, group in {0: "0-1", 1: "0-1"}.items():
        topo = tmp_path / f"cpu{cpu}" / "topology"
        topo.mkdir(parents=True)
        (topo / "thread_siblings_list").write_text(group)
    assert physical_cores([0, 1], tmp_path) == 1


def test_unreadable_topology_falls_back_to_logical_cpus(tmp_path):
    assert physical_cores([0, 1, 2], tmp_path / "absent") == 3


@pytest.mark.parametrize("text, cores", [("max 100000", None), ("200000 100000", 2), ("150000 100000", 2),
                                         ("50000 100000", 1)])
def test_cgroup_v2_quota(tmp_path, text, cores):
    # cgroup v2 cpu.max: "$MAX $PERIOD" in microseconds, "max" when unlimited (kernel docs,
    # Documentation/admin-guide/cgroup-v2.rst); a fraction of a CPU rounds up.
    (tmp_path / "cpu.max").write_text(text + "\n")
    assert quota_cores(tmp_path) == cores


def test_cgroup_v1_quota(tmp_path):
    (tmp_path / "cpu").mkdir()
    (tmp_path / "cpu" / "cpu.cfs_quota_us").write_text("300000\n")
    (tmp_path / "cpu" / "cpu.cfs_period_us").write_text("100000\n")
    assert quota_cores(tmp_path) == 3
    (tmp_path / "cpu" / "cpu.cfs_quota_us").write_text("-1\n")  # unlimited
    assert quota_cores(tmp_path) is None


def test_usable_cores_takes_the_smaller_of_cores_and_quota(tmp_path, monkeypatch):
    import warmstart.base.cores as cores

    sysfs = _sysfs(tmp_path / "sys", {i: str(i) for i in range(8)})
    monkeypatch.setattr(cores, "allowed_cpus", lambda: list(range(8)))
    (tmp_path / "cg").mkdir()
    (tmp_path / "cg" / "cpu.max").write_text("300000 100000")
    assert usable_cores(sysfs, tmp_path / "cg") == 3
    (tmp_path / "cg" / "cpu.max").write_text("max 100000")
    assert usable_cores(sysfs, tmp_path / "cg") == 8
    monkeypatch.setattr(cores, "allowed_cpus", lambda: [5])
    assert usable_cores(sysfs, tmp_path / "cg") == 1


def test_this_machine_has_at_least_one_usable_core():
    import os

    assert 1 <= usable_cores() <= (os.cpu_count() or 1)


def test_precision_auto_is_float32_on_every_cpu(monkeypatch):
    # Even a CPU with native bf16 trains in float32 unless asked: bf16 changes the numbers.
    import warmstart.pretrain.precision as precision

    monkeypatch.setattr(precision, "native_low_precision", lambda dtype: True)
    assert precision.resolve_precision("auto", "cpu") == "32-true"
    assert precision.resolve_precision("32", "cpu") == "32-true"
    assert precision.resolve_precision("bf16-mixed", "cpu") == "bf16-mixed"  # native: allowed when asked


@pytest.mark.parametrize("requested", ["bf16-mixed", "16-mixed"])
def test_low_precision_on_an_emulating_cpu_is_refused(monkeypatch, requested):
    import warmstart.pretrain.precision as precision
    from warmstart.errors import PretrainError

    monkeypatch.setattr(precision, "native_low_precision", lambda dtype: False)
    with pytest.raises(PretrainError, match="without native .*10x slower"):
        precision.resolve_precision(requested, "cpu")
    if not precision.runs_on_cpu("auto"):
        pytest.skip("a GPU is present: accelerator auto does not run on the CPU here")
    with pytest.raises(PretrainError):
        precision.resolve_precision(requested, "auto")


def test_native_check_matches_the_cpu_flags():
    # oneDNN's own check against the kernel's CPU flags: AVX-512 BF16 or AMX-BF16 mean native bf16
    # (Intel's and AMD's instruction-set manuals; from memory).
    from warmstart.pretrain.precision import native_low_precision

    try:
        flags = set(Path("/proc/cpuinfo").read_text().split("flags")[1].split("\n")[0].split())
    except (OSError, IndexError):
        pytest.skip("no /proc/cpuinfo")
    has = bool(flags & {"avx512_bf16", "amx_bf16"})
    if not has:
        assert native_low_precision("bfloat16") is False
    else:
        assert native_low_precision("bfloat16") is True


def test_an_emulated_precision_is_refused_before_the_run_folder_is_made(tmp_path, monkeypatch):
    from conftest import tiny_corpus

    import warmstart.pretrain.precision as precision
    from warmstart.errors import PretrainError
    from warmstart.pretrain.loop import pretrain
    from warmstart.pretrain.settings import PretrainSettings

    monkeypatch.setattr(precision, "native_low_precision", lambda dtype: False)
    with pytest.raises(PretrainError, match="bfloat16"):
        pretrain(tiny_corpus(tmp_path, n=1), tmp_path / "run", PretrainSettings(precision="bf16-mixed", accelerator="cpu"), progress=False)
    assert not (tmp_path / "run").exists()


def test_the_cli_names_the_reason_and_sets_the_threads(tmp_path, monkeypatch, capsys):
    from conftest import tiny_corpus

    import torch

    import warmstart.pretrain.precision as precision
    from warmstart.cli import main

    corpus = tiny_corpus(tmp_path, n=1)
    monkeypatch.setattr(precision, "native_low_precision", lambda dtype: False)
    code = main(["-q", "pretrain", str(corpus), "-o", str(tmp_path / "r"), "--precision", "bf16-mixed",
                 "--accelerator", "cpu", "--max-steps", "1"])
    err = capsys.readouterr().err
    assert code != 0 and "bfloat16" in err and "Traceback" not in err
    before = torch.get_num_threads()
    try:
        assert main(["-q", "pretrain", str(corpus), "-o", str(tmp_path / "r1"), "--recipe", "smoke", "--threads", "1",
                     "--accelerator", "cpu", "--max-steps", "1"]) == 0
        assert torch.get_num_threads() == 1
        import json

        assert json.loads((tmp_path / "r1" / "recipe.json").read_text())["pretrain"]["threads"] == 1
    finally:
        torch.set_num_threads(before)
