"""The run folder: built under a temporary sibling name, renamed into place when complete.

``--out DIR`` names the run folder itself.  DIR must not exist (unless ``force``, which moves
the old folder aside and deletes it only after the new one is in place).  An interrupted run
leaves only a ``.DIR.partial-*`` sibling, never something that looks finished.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import shutil
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from graybox.errors import RunError

RESULTS = "results.json"


def sha256_file(path: Path, chunk: int = 1 << 20) -> str:
    """The SHA-256 of a file's bytes as hex, read in ``chunk``-byte blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


WRITABLE_HINT = "choose a writable folder for --out (not under /proc or /sys, not on a read-only file system)"


def check_target(out: Path, force: bool) -> None:
    """Refuse a run folder that could not be built, before any computation: an existing one
    (without ``force``), a missing or non-folder parent, or a parent where nothing can be
    created (read-only or pseudo file systems: a folder is made and removed there to know)."""
    if out.exists() and not force:
        raise RunError(f"the run folder {out} already exists", hint="choose another --out or add --force to replace it")
    if out.exists() and not out.is_dir():
        raise RunError(f"{out} exists and is not a folder", hint="choose another --out")
    if not out.parent.exists():
        raise RunError(f"the parent folder {out.parent} does not exist", hint="create it first or choose another --out")
    if not out.parent.is_dir():
        raise RunError(f"cannot create the run folder {out}: {out.parent} is not a folder", hint=WRITABLE_HINT)
    try:
        os.rmdir(tempfile.mkdtemp(prefix=f".{out.name}.probe-", dir=out.parent))
    except OSError as exc:
        raise RunError(f"cannot create the run folder {out}: {exc.strerror or exc}", hint=WRITABLE_HINT) from None


def _write_error(out: Path, exc: OSError) -> RunError:
    """An OSError while building the run folder, as a user error naming the file."""
    what = f" ({exc.filename})" if exc.filename else ""
    return RunError(f"cannot write the run folder {out}: {exc.strerror or exc}{what}", hint=WRITABLE_HINT)


@contextmanager
def building(out: Path, force: bool = False) -> Iterator[Path]:
    """Yield a temporary folder next to ``out``; on success rename it to ``out``."""
    out = Path(out).absolute()
    check_target(out, force)
    try:
        tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    except OSError as exc:
        raise _write_error(out, exc) from None
    umask = os.umask(0)
    os.umask(umask)
    try:
        os.chmod(tmp, 0o777 & ~umask)  # mkdtemp makes it private; a run folder is for colleagues
        yield tmp
    except OSError as exc:  # a full disk, a file system that went read-only, ...
        shutil.rmtree(tmp, ignore_errors=True)
        raise _write_error(out, exc) from None
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    try:
        if out.exists():
            old = out.parent / f".{out.name}.old-{os.getpid()}"
            os.replace(out, old)
        os.replace(tmp, out)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if old is not None and old.exists() and not out.exists():
            os.replace(old, out)  # the old run folder stays where it was
        raise _write_error(out, exc) from None
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, (np.floating, float)):
        v = float(value)
        return v if math.isfinite(v) else None  # JSON has no NaN/inf: null, documented
    if isinstance(value, (np.integer,)):
        return int(value)
    if isinstance(value, (np.bool_,)):
        return bool(value)
    if isinstance(value, Path):
        return str(value)
    return value


def write_json(path: Path, data: dict) -> None:
    """A document written as indented JSON (numpy values made plain; NaN and infinities as
    null, since JSON has none)."""
    path.write_text(json.dumps(_jsonable(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def read_results(run_dir: Path) -> dict:
    """A finished run folder's ``results.json``; a RunError if it is missing or not JSON."""
    path = Path(run_dir) / RESULTS
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RunError(f"{run_dir} is not a finished run folder (no {RESULTS})") from None
    except json.JSONDecodeError as exc:
        raise RunError(f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno})") from None
