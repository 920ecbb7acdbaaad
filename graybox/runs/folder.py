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
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()


def check_target(out: Path, force: bool) -> None:
    if out.exists() and not force:
        raise RunError(f"the run folder {out} already exists", hint="choose another --out or add --force to replace it")
    if out.exists() and not out.is_dir():
        raise RunError(f"{out} exists and is not a folder", hint="choose another --out")
    if not out.parent.exists():
        raise RunError(f"the parent folder {out.parent} does not exist", hint="create it first or choose another --out")


@contextmanager
def building(out: Path, force: bool = False) -> Iterator[Path]:
    """Yield a temporary folder next to ``out``; on success rename it to ``out``."""
    out = Path(out).absolute()
    check_target(out, force)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=out.parent))
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o777 & ~umask)  # mkdtemp makes it private; a run folder is for colleagues
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    if out.exists():
        old = out.parent / f".{out.name}.old-{os.getpid()}"
        os.replace(out, old)
    os.replace(tmp, out)
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
    path.write_text(json.dumps(_jsonable(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def read_results(run_dir: Path) -> dict:
    path = Path(run_dir) / RESULTS
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise RunError(f"{run_dir} is not a finished run folder (no {RESULTS})") from None
    except json.JSONDecodeError as exc:
        raise RunError(f"{path}: not valid JSON (line {exc.lineno}, column {exc.colno})") from None
