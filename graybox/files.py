"""Reading input files safely: only regular files, of a sane size, never blocking.

A path handed to graybox may name anything: a FIFO (opening it for reading waits for a
writer forever), a device such as ``/dev/zero`` (reading it never ends), a folder, or a link
to any of these.  :func:`check_regular_file` refuses all but regular files *before* the file
is opened (``os.stat`` follows links, so a link to ``/dev/zero`` is judged as the device);
:func:`read_regular_file` then opens without blocking, checks the opened file again (the
path may have been swapped in between) and reads at most ``max_bytes``.

Every layer calls these with its own error type (``ConfigError`` for study files,
``DataError`` for historian files, ``BatchError`` for manifests), so each refusal is located
and carries a hint.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

from graybox.errors import GrayboxError

MIB = 1 << 20


def _kind(mode: int) -> str:
    """What a non-regular file is, in words."""
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a FIFO (named pipe)"
    if stat.S_ISCHR(mode):
        return "a character device"
    if stat.S_ISBLK(mode):
        return "a block device"
    if stat.S_ISSOCK(mode):
        return "a socket"
    return "not a regular file"


def _refuse(path: Path, st: os.stat_result, what: str, max_bytes: int | None,
            error: type[GrayboxError]) -> None:
    if not stat.S_ISREG(st.st_mode):
        raise error(f"the {what} {path} is {_kind(st.st_mode)}, not a regular file",
                    hint=f"give the path of an ordinary {what} (links to ordinary files are fine)")
    if max_bytes is not None and st.st_size > max_bytes:
        raise error(f"the {what} {path} is {st.st_size:,} bytes, more than the {max_bytes:,} allowed",
                    hint=f"a {what} is at most {max_bytes / MIB:g} MiB; check that the path names the right file")


def check_regular_file(path: str | Path, *, what: str, max_bytes: int | None = None,
                       error: type[GrayboxError] = GrayboxError) -> os.stat_result:
    """``os.stat`` of ``path`` if it is a regular file of at most ``max_bytes`` bytes;
    otherwise ``error`` (also for a missing or unreadable path), naming ``what`` it should be."""
    path = Path(path)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        raise error(f"{what} not found: {path}") from None
    except OSError as exc:
        raise error(f"cannot read the {what} {path}: {exc.strerror}") from None
    _refuse(path, st, what, max_bytes, error)
    return st


def read_regular_file(path: str | Path, *, what: str, max_bytes: int,
                      error: type[GrayboxError] = GrayboxError) -> bytes:
    """The bytes of the regular file ``path`` (at most ``max_bytes``), or ``error``."""
    path = Path(path)
    check_regular_file(path, what=what, max_bytes=max_bytes, error=error)
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0))
    except OSError as exc:
        raise error(f"cannot read the {what} {path}: {exc.strerror}") from None
    try:
        _refuse(path, os.fstat(fd), what, max_bytes, error)  # the path may have changed since the stat
        with os.fdopen(fd, "rb", closefd=False) as fh:
            data = fh.read(max_bytes + 1)
    except OSError as exc:
        raise error(f"cannot read the {what} {path}: {exc.strerror}") from None
    finally:
        os.close(fd)
    if len(data) > max_bytes:  # it grew while being read
        raise error(f"the {what} {path} is more than the {max_bytes:,} bytes allowed",
                    hint=f"a {what} is at most {max_bytes / MIB:g} MiB")
    return data
