"""Output files written whole or not at all.

Every file a command writes goes to a temporary name beside its target (the target's name
plus ``.tmp``) and is renamed once complete; a rename within one folder is atomic (POSIX
rename()). A write that fails removes its temporary file, so a full disk, a Ctrl-C or a
crash never leaves a half-written result, and what exists is complete.
"""

from __future__ import annotations

import contextlib
import errno
import os
from pathlib import Path
from typing import Iterator

TMP_SUFFIX = ".tmp"


@contextlib.contextmanager
def atomic_path(path) -> Iterator[Path]:
    """Yield the temporary path to write ``path`` through; renamed to ``path`` when the
    block ends normally, removed when it raises."""
    path = Path(path)
    tmp = path.with_name(path.name + TMP_SUFFIX)
    try:
        yield tmp
        os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):
            tmp.unlink()
        if exc.filename is None or exc.filename == str(tmp):
            # a full disk reported by write() or by a library names no file: name the
            # result the write was for
            raise OSError(exc.errno, exc.strerror or str(exc), str(path)) from exc
        raise
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise


def write_atomic(path, data: str | bytes) -> None:
    """Write text (UTF-8, ``\\n`` line ends) or bytes to ``path``, whole or not at all."""
    with atomic_path(path) as tmp:
        if isinstance(data, bytes):
            tmp.write_bytes(data)
        else:
            tmp.write_text(data, encoding="utf-8", newline="\n")


def os_error_text(exc: OSError) -> str:
    """Which file and what went wrong with it, in one line: ``results/x/report.html: No
    space left on device``."""
    text = exc.strerror or str(exc)
    return f"{exc.filename}: {text}" if exc.filename is not None else text


class DamagedFile(OSError):
    """A saved result file that is not what the command wrote (truncated, edited, another
    kind of file); its message names the file and how to mend it."""

    def __init__(self, path, what: str):
        super().__init__(errno.EIO, what, str(path))
