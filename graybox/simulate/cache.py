"""The on-disk home of generated simulation modules (and numba's compiled code next to them).

A generated module is a plain Python file named by a key that covers everything its text and
its machine code depend on: the model's digest (:func:`graybox.simulate.generate.spec_digest`),
a hash of the generated text itself, and the versions of graybox, numba, numpy and Python.
numba's own cache (``cache=True``) then stores the compiled machine code in the
``__pycache__`` folder beside the file, keyed by the file's path and time stamp, so a second
process importing the same file loads the machine code instead of compiling it.

The folder is ``$GRAYBOX_CACHE_DIR`` when set, else ``~/.cache/graybox/compiled``.  Files are
written to a temporary name in the same folder and then given their name atomically (a hard
link that fails if the name exists, else :func:`os.replace`), and an existing file is never
rewritten (its time stamp is what numba's cache index checks), so processes racing to create
the same module are harmless.
"""

from __future__ import annotations

import hashlib
import importlib.util
import os
import sys
import tempfile
from contextlib import contextmanager
from pathlib import Path
from types import ModuleType

ENV_VAR = "GRAYBOX_CACHE_DIR"
MODULE_PREFIX = "graybox_compiled_"


def cache_dir() -> Path:
    """The cache folder (created if missing)."""
    base = os.environ.get(ENV_VAR)
    path = Path(base).expanduser() if base else Path.home() / ".cache" / "graybox" / "compiled"
    path.mkdir(parents=True, exist_ok=True)
    return path


def versions() -> dict[str, str]:
    """The versions the machine code depends on."""
    import numba
    import numpy

    from graybox.versions import GRAYBOX_VERSION

    return {"graybox": GRAYBOX_VERSION, "numba": numba.__version__, "numpy": numpy.__version__,
            "python": "%d.%d.%d" % sys.version_info[:3]}


def module_key(model_digest: str, source: str) -> str:
    """File stem for a generated module: model digest plus a hash of text and versions."""
    parts = [source, *(f"{k}={v}" for k, v in sorted(versions().items()))]
    tail = hashlib.sha256("\n".join(parts).encode()).hexdigest()[:16]
    return f"{MODULE_PREFIX}{model_digest}_{tail}"


def write_once(folder: Path, stem: str, source: str) -> Path:
    """The module file ``folder/stem.py``, written atomically unless it already exists."""
    path = folder / f"{stem}.py"
    if path.exists():
        return path
    fd, tmp = tempfile.mkstemp(prefix=f".{stem}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(source)
        _publish(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.unlink(tmp)
    return path


def _publish(tmp: str, path: Path) -> None:
    """Move a complete temporary file into place unless ``path`` exists.  A hard link creates
    the name atomically only if it is free, so of two racing processes the first file (and
    its time stamp, which numba's cache index records) stays; where hard links are not
    supported, :func:`os.replace` (atomic, last writer wins) is used."""
    try:
        os.link(tmp, path)
    except FileExistsError:
        pass
    except OSError:
        if not path.exists():
            os.replace(tmp, path)


@contextmanager
def exclusive(path: Path):
    """Hold an exclusive advisory lock on ``path`` (created if missing) while inside: the
    first process compiles a kernel, the others wait and then load its machine code from
    numba's cache instead of compiling it too.  Without ``fcntl`` (Windows) no lock is taken:
    racing processes then compile twice, which is only slower."""
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX
        yield
        return
    with open(path, "a+") as fh:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(fh.fileno(), fcntl.LOCK_UN)


def import_file(path: Path, name: str) -> ModuleType:
    """Import a generated module from its file (once per process)."""
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, path)
    if spec is None or spec.loader is None:
        raise ImportError(f"cannot import generated module {path}")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    try:
        spec.loader.exec_module(module)
    except BaseException:
        del sys.modules[name]
        raise
    return module


def load_generated(model_digest: str, source: str) -> ModuleType:
    """Write (if needed) and import the generated module for ``source``."""
    stem = module_key(model_digest, source)
    try:
        folder = cache_dir()
        path = write_once(folder, stem, source)
    except OSError:  # an unwritable cache folder: a private temporary one still works
        folder = Path(tempfile.gettempdir()) / f"graybox-compiled-{os.getuid() if hasattr(os, 'getuid') else 'user'}"
        folder.mkdir(parents=True, exist_ok=True)
        path = write_once(folder, stem, source)
    return import_file(path, stem)
