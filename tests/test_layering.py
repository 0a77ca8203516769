"""The arrows between stages: reading and corpus code never import torch, export never imports the trainer.

Checked two ways: statically (every import statement of a module, including those inside
functions, which run later) and at run time (importing the modules in a fresh interpreter).
"""
from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import pytest

PKG = Path(__file__).resolve().parents[1] / "src" / "warmstart"


def _imports(path: Path) -> list[str]:
    """Absolute names of every module a file imports (relative imports resolved against the package)."""
    package = list(path.relative_to(PKG.parent).with_suffix("").parts)[:-1]  # the package a module is in
    out = []
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            out.append(mod)
            out += [f"{mod}.{a.name}" for a in node.names]
    return out


def _files(*names: str) -> list[Path]:
    files = []
    for n in names:
        p = PKG / n
        files += sorted(p.rglob("*.py")) if p.is_dir() else [p]
    return files


TORCH_FREE = _files("volumes", "intensity.py", "corpus", "base", "recipe.py", "run_folder.py", "errors.py")


@pytest.mark.parametrize("path", TORCH_FREE, ids=lambda p: str(p.relative_to(PKG)))
def test_reading_and_corpus_modules_never_import_torch(path):
    bad = [m for m in _imports(path) if m.split(".")[0] in ("torch", "torchvision", "lightly", "pytorch_lightning", "lightning")]
    assert not bad, f"{path.relative_to(PKG)} imports {bad}"


@pytest.mark.parametrize("path", _files("export"), ids=lambda p: str(p.relative_to(PKG)))
def test_export_imports_nothing_from_pretrain(path):
    bad = [m for m in _imports(path) if m == "warmstart.pretrain" or m.startswith("warmstart.pretrain.")]
    assert not bad, f"{path.relative_to(PKG)} imports {bad}"


def test_the_import_checker_sees_relative_and_late_imports(tmp_path, monkeypatch):
    # The checker itself, on the kind of import the export stage once had: relative, two levels
    # up, inside a function.
    fake = tmp_path / "warmstart" / "export" / "late.py"
    fake.parent.mkdir(parents=True)
    fake.write_text("def f():\n    from ..pretrain.methods import build_method\n    import torch.nn\n")
    monkeypatch.setattr(sys.modules[__name__], "PKG", tmp_path / "warmstart")
    names = _imports(fake)
    assert "warmstart.pretrain.methods" in names and "torch.nn" in names


def test_at_run_time_too():
    code = (
        "import sys, importlib, pkgutil, warmstart\n"
        "import warmstart.volumes, warmstart.corpus, warmstart.base\n"
        "for pkg in (warmstart.volumes, warmstart.corpus, warmstart.base):\n"
        "    for m in pkgutil.iter_modules(pkg.__path__): importlib.import_module(f'{pkg.__name__}.{m.name}')\n"
        "import warmstart.intensity, warmstart.recipe, warmstart.run_folder, warmstart.cli\n"
        "torch_free = 'torch' not in sys.modules\n"
        "import warmstart.export\n"
        "for m in pkgutil.iter_modules(warmstart.export.__path__): importlib.import_module(f'warmstart.export.{m.name}')\n"
        "print(torch_free, any(k.startswith('warmstart.pretrain') for k in sys.modules))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert out == ["True", "False"]
