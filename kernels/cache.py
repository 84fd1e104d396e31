"""Where numba keeps the compiled kernels: a per-user cache folder, never the package.

numba's default for ``cache=True`` writes ``*.nbi``/``*.nbc`` files into ``__pycache__``
beside the source. For an installed package that is ``site-packages/dyadperm/kernels``,
where the files outlive ``pip uninstall`` and leave a folder that shadows a later editable
install. This module registers a cache locator (before any kernel is decorated) that
sends the cache of this folder's kernels to

    $DYADPERM_CACHE_DIR                       when set, else
    $XDG_CACHE_HOME/dyadperm                  when set, else
    ~/.cache/dyadperm

in a subfolder keyed by the package version and a hash of this folder's path and every
kernel source file. A new version, or any edit of a kernel file (also of a helper that
other files inline, which numba's own per-file check misses), gets a fresh folder: stale
machine code is never loaded; another copy of the same sources elsewhere gets its own.
Old folders are harmless and may be deleted at any time. Only this package's kernels are
affected; other numba code in the same process keeps numba's own settings.

If the folder cannot be made or written, the kernels are compiled into a folder of the
system's temporary directory for this process (with a warning), never into the package.
"""

from __future__ import annotations

import atexit
import hashlib
import os
import shutil
import tempfile
import warnings
from pathlib import Path

from numba.core import caching

#: Environment variable naming the cache root (overrides XDG_CACHE_HOME).
CACHE_ENV = "DYADPERM_CACHE_DIR"
KERNEL_DIR = Path(__file__).resolve().parent


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("dyadperm")
    except PackageNotFoundError:  # run from a source tree that was never installed
        return "source"


def _source_hash() -> str:
    h = hashlib.sha256()
    # The folder too: numba's cached code names the module it was compiled from, so two
    # copies of the same sources (a second checkout, a copy for an experiment) sharing a
    # folder would load each other's code and fail to import the other's module.
    h.update(str(KERNEL_DIR).encode())
    for path in sorted(KERNEL_DIR.glob("*.py")):
        h.update(path.name.encode())
        h.update(path.read_bytes())
    return h.hexdigest()[:16]


def cache_root() -> Path:
    """The user's cache root of dyadperm (environment variables read now)."""
    root = os.environ.get(CACHE_ENV)
    if root:
        return Path(root).expanduser()
    xdg = os.environ.get("XDG_CACHE_HOME")
    base = Path(xdg).expanduser() if xdg else Path.home() / ".cache"
    return base / "dyadperm"


def cache_dir() -> Path:
    """The folder of this version's (and these sources') compiled kernels."""
    return cache_root() / f"kernels-{_version()}-{_source_hash()}"


def _writable(path: Path) -> bool:
    try:
        path.mkdir(parents=True, exist_ok=True)
        tempfile.TemporaryFile(dir=path).close()
    except OSError:
        return False
    return True


def _choose() -> Path:
    wanted = cache_dir()
    if _writable(wanted):
        return wanted
    fallback = Path(tempfile.mkdtemp(prefix="dyadperm-kernels-"))
    atexit.register(shutil.rmtree, fallback, True)
    warnings.warn(f"dyadperm: cannot write the kernel cache folder {wanted}; compiled kernels "
                  f"are kept in {fallback} for this process only (set {CACHE_ENV} to a "
                  "writable folder)", RuntimeWarning, stacklevel=3)
    return fallback


CACHE_DIR = _choose()


class KernelCacheLocator(caching.UserProvidedCacheLocator):
    """numba cache locator for the functions defined in this folder's files."""

    def __init__(self, py_func, py_file):
        self._py_file = py_file
        self._lineno = py_func.__code__.co_firstlineno
        self._cache_path = str(CACHE_DIR)

    @classmethod
    def from_function(cls, py_func, py_file):
        try:
            inside = Path(py_file).resolve().parent == KERNEL_DIR
        except OSError:
            return None
        if not inside:
            return None
        self = cls(py_func, py_file)
        self.ensure_cache_path()
        return self


def install() -> None:
    """Put the locator first in numba's list (once)."""
    classes = caching.CacheImpl._locator_classes
    if KernelCacheLocator not in classes:
        classes.insert(0, KernelCacheLocator)


install()
