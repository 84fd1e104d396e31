"""numba's cache of the kernels lives in a per-user folder, never inside the package.

A cache inside ``site-packages/dyadperm/kernels/__pycache__`` outlives ``pip uninstall`` and
turns the folder into a namespace package that shadows a later editable install; these
tests pin where the cache goes and that a kernel compiled in a fresh process lands there.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import dyadperm.kernels as kernels_pkg
from dyadperm.kernels import cache

KERNEL_DIR = Path(kernels_pkg.__file__).resolve().parent

# Compiles one small kernel (fill_gram) in a fresh process and prints the cache folder used.
_COMPILE_ONE = """
import numpy as np
from dyadperm.kernels import cache
from dyadperm.kernels.stats import fill_gram
gram = np.empty((1, 3, 3))
fill_gram(np.ones((1, 1, 1)), np.eye(3), gram)
print(cache.CACHE_DIR)
"""


def _run(env_changes: dict, code: str = _COMPILE_ONE) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k not in ("DYADPERM_CACHE_DIR",
                                                            "XDG_CACHE_HOME")}
    env.update(env_changes)
    env.pop("NUMBA_DISABLE_JIT", None)
    return subprocess.run([sys.executable, "-W", "error::RuntimeWarning", "-c", code],
                          env=env, capture_output=True, text=True, timeout=300)


def _cache_files(folder: Path) -> list[Path]:
    return [p for p in folder.rglob("*") if p.suffix in (".nbi", ".nbc")]


def test_root_follows_our_variable_then_xdg_then_home(monkeypatch, tmp_path):
    monkeypatch.setenv("DYADPERM_CACHE_DIR", str(tmp_path / "ours"))
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert cache.cache_root() == tmp_path / "ours"
    monkeypatch.delenv("DYADPERM_CACHE_DIR")
    assert cache.cache_root() == tmp_path / "xdg" / "dyadperm"
    monkeypatch.delenv("XDG_CACHE_HOME")
    assert cache.cache_root() == Path.home() / ".cache" / "dyadperm"


def test_folder_is_keyed_by_version_and_kernel_sources(monkeypatch, tmp_path):
    from importlib.metadata import version

    monkeypatch.setenv("DYADPERM_CACHE_DIR", str(tmp_path))
    folder = cache.cache_dir()
    assert folder.parent == tmp_path
    assert folder.name.startswith(f"kernels-{version('dyadperm')}-")
    # an edit of any kernel source gives another folder
    monkeypatch.setattr(cache, "KERNEL_DIR", tmp_path)
    (tmp_path / "one.py").write_text("x = 1\n")
    assert cache.cache_dir() != folder


def test_a_copy_of_the_kernels_elsewhere_neither_shares_nor_breaks_the_cache(tmp_path):
    # Found when an experiment copied the kernel folder: with the cache keyed by the sources
    # alone, the copy and the package shared a folder, and the package then loaded code
    # compiled from the copy and failed to import the copy's module.
    import shutil

    copy = tmp_path / "src" / "kernelcopy"
    shutil.copytree(KERNEL_DIR, copy, ignore=shutil.ignore_patterns("__pycache__"))
    root = tmp_path / "cache"
    compile_copy = (f"import sys; sys.path.insert(0, {str(copy.parent)!r})\n"
                    + _COMPILE_ONE.replace("dyadperm.kernels", "kernelcopy"))
    first = _run({"DYADPERM_CACHE_DIR": str(root)}, code=compile_copy)
    assert first.returncode == 0, first.stderr[-2000:]
    second = _run({"DYADPERM_CACHE_DIR": str(root)})
    assert second.returncode == 0, second.stderr[-2000:]
    used = {Path(p.stdout.strip().splitlines()[-1]) for p in (first, second)}
    assert len(used) == 2 and all(u.parent == root for u in used)


def test_kernels_compile_into_the_user_folder_not_the_package(tmp_path):
    before = set(_cache_files(KERNEL_DIR))
    proc = _run({"DYADPERM_CACHE_DIR": str(tmp_path)})
    assert proc.returncode == 0, proc.stderr[-2000:]
    used = Path(proc.stdout.strip().splitlines()[-1])
    assert used.parent == tmp_path
    names = {p.name for p in _cache_files(used)}
    assert any(n.startswith("stats.fill_gram-") and n.endswith(".nbi") for n in names), names
    assert set(_cache_files(KERNEL_DIR)) == before  # nothing new inside the package


def test_xdg_cache_home_is_honoured(tmp_path):
    proc = _run({"XDG_CACHE_HOME": str(tmp_path)})
    assert proc.returncode == 0, proc.stderr[-2000:]
    used = Path(proc.stdout.strip().splitlines()[-1])
    assert used.parent == tmp_path / "dyadperm"
    assert _cache_files(used)


def test_unwritable_folder_warns_and_never_uses_the_package(tmp_path):
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder")
    before = set(_cache_files(KERNEL_DIR))
    proc = _run({"DYADPERM_CACHE_DIR": str(blocker / "cache")},
                code="import warnings\nwarnings.simplefilter('default')\n" + _COMPILE_ONE)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert "cannot write the kernel cache folder" in proc.stderr
    used = Path(proc.stdout.strip().splitlines()[-1])
    assert used.name.startswith("dyadperm-kernels-") and KERNEL_DIR not in used.parents
    assert set(_cache_files(KERNEL_DIR)) == before
