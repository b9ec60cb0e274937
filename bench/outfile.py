"""Write a file a user named: a regular file is replaced atomically, a symlink is written through to
its target, a device or pipe (/dev/null, /dev/stdout, a FIFO) is written in place, never replaced."""

from __future__ import annotations

import contextlib
import os
import stat
from pathlib import Path
from typing import Optional

from eaves.errors import InputError

# Paths whose symlinks are the kernel's views of open descriptors (/dev/stdout -> /proc/self/fd/1):
# resolved, they name whatever the shell redirected to, which must be written as it is, not replaced.
_DESCRIPTOR_PATHS = ("/proc/", "/dev/fd/", "/dev/stdin", "/dev/stdout", "/dev/stderr")


def check_output_path(path: Optional[str], option: str) -> None:
    """Refuse, before any measurement, an output path that cannot be written: a folder, a missing or
    read-only folder, a device or file not open to us. '-' (stdout) and None pass."""
    if not path or path == "-":
        return
    target = Path(path)
    if target.is_dir():
        raise InputError(f"{option} {path}: is a folder, not a file")
    if target.exists():
        if not os.access(target, os.W_OK):
            raise InputError(f"{option} {path}: not writable")
        if not _replaceable(path):
            return  # a device or pipe is written in place: its folder does not matter
    folder = Path(os.path.realpath(path)).parent
    if not folder.is_dir():
        raise InputError(f"{option} {path}: folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise InputError(f"{option} {path}: folder {folder} is not writable")


def write_text(path: str, text: str, option: str) -> None:
    """Write `text` to `path` (see the module); an OSError is a one-line InputError naming `option`."""
    try:
        if _replaceable(path):
            _replace(Path(os.path.realpath(path)), text)
        else:  # appended: /dev/stdout redirected to a file must not lose what was written before
            with open(path, "a", encoding="utf-8") as out:
                out.write(text)
    except OSError as err:
        raise InputError(f"{option} {path}: cannot write: {err.strerror or err}") from None


def _replaceable(path: str) -> bool:
    """A regular file (or none yet) reached by an ordinary path: replace it; anything else: write in place."""
    if os.path.abspath(path).startswith(_DESCRIPTOR_PATHS):
        return False
    try:
        return stat.S_ISREG(os.stat(path).st_mode)
    except FileNotFoundError:
        return True


def _replace(target: Path, text: str) -> None:
    """A temporary file beside the target, synced, then renamed over it: readers see the old file or the
    new one, never half of it. The target keeps its permission bits; a new file gets the umask's."""
    try:
        mode: Optional[int] = stat.S_IMODE(os.stat(target).st_mode)
    except FileNotFoundError:
        mode = None
    tmp = target.with_name(f".{target.name}.{os.getpid()}.part")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | getattr(os, "O_NOFOLLOW", 0), 0o666)
    try:
        with open(fd, "w", encoding="utf-8") as out:
            out.write(text)
            out.flush()
            os.fsync(out.fileno())
        if mode is not None:
            os.chmod(tmp, mode)
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
