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
#: The names the commands' figures start with (``plots/``): what a report may replace there.
PLOT_PREFIXES = ("hist-", "tornado-", "driver-", "whatif-", "choose-", "waveforms-")


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


class FolderBusy(OSError):
    """A result folder another process is writing (see :class:`FolderLock`)."""


try:
    import fcntl
except ImportError:  # no advisory locks on this system: folders are not locked
    fcntl = None

#: folders this process holds: resolved path -> [holders, descriptor or None]
_HELD: dict[str, list] = {}


class FolderLock:
    """An advisory lock on a result folder for as long as a command writes it.

    Two commands writing one folder at once (two ``--resume`` of the same run) deleted each
    other's temporary files. The lock is ``flock`` on the folder itself, so no lock file is
    left behind and the kernel drops it when the process ends, however it ends (SIGKILL
    included). Within one process the holders of a folder share one lock: the command
    line's run holds it from the run through its reports. ``acquire`` takes it once the
    folder exists; a folder another process holds raises :class:`FolderBusy`.
    """

    def __init__(self, folder):
        self.key = str(Path(folder).resolve())
        self.folder = Path(folder)

    def __enter__(self) -> "FolderLock":
        _HELD.setdefault(self.key, [0, None])[0] += 1
        return self

    def acquire(self) -> None:
        entry = _HELD[self.key]
        if entry[1] is not None or fcntl is None or not self.folder.is_dir():
            return
        fd = os.open(self.folder, os.O_RDONLY)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            os.close(fd)
            if exc.errno in (errno.EWOULDBLOCK, errno.EAGAIN, errno.EACCES):
                raise FolderBusy(exc.errno, "is being written by another command",
                                 str(self.folder)) from None
            return  # a file system without locks: go on unlocked
        entry[1] = fd

    def __exit__(self, *exc) -> None:
        entry = _HELD[self.key]
        entry[0] -= 1
        if entry[0] == 0:
            if entry[1] is not None:
                os.close(entry[1])  # closing the descriptor drops the lock
            del _HELD[self.key]
