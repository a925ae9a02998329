"""Reading files a user names: regular files only, a size cap, data paths kept inside a folder.

Used by the system-file reader (:mod:`fe_tool.systemfile`) and the control-file reader
(:mod:`fe_tool.control.storage`). Each function takes the caller's exception class, so a
problem surfaces as that module's error (``SystemFileError``, ``ControlFileError``).
Messages name the file and the problem, never the file's contents.
"""
from __future__ import annotations

import os
import pathlib
import stat
from typing import BinaryIO

MIB = 2**20


def size_text(n_bytes: int) -> str:
    """A byte count for messages: ``"64 MiB"`` for whole mebibytes, else bytes."""
    return f"{n_bytes // MIB} MiB" if n_bytes % MIB == 0 and n_bytes >= MIB else f"{n_bytes} bytes"


def _kind_of(mode: int) -> str:
    for test, name in ((stat.S_ISDIR, "a folder"), (stat.S_ISFIFO, "a pipe (FIFO)"),
                       (stat.S_ISCHR, "a character device"), (stat.S_ISBLK, "a block device"),
                       (stat.S_ISSOCK, "a socket")):
        if test(mode):
            return name
    return "not a regular file"


def resolve_inside(folder: str | os.PathLike, name: str, *, allow_outside: bool, error: type[Exception],
                   what: str) -> pathlib.Path:
    """``folder / name`` with symlinks and ``..`` resolved; refused outside ``folder`` unless allowed.

    Args:
        folder: the folder relative paths start from (e.g. the system file's folder).
        name: the path as written (relative, or absolute).
        allow_outside: accept a path that resolves outside ``folder``.
        error: exception class to raise; ``what`` names the key in its message.
    """
    if not isinstance(name, str) or not name.strip() or "\0" in name:
        raise error(f"{what}: expected a file name (non-empty text without NUL characters)")
    base = pathlib.Path(folder).resolve()
    try:
        target = (base / name).resolve()
    except (OSError, RuntimeError) as err:  # e.g. a symlink loop
        raise error(f"{what}: the path cannot be resolved ({type(err).__name__})") from None
    if not allow_outside and not target.is_relative_to(base):
        raise error(f"{what}: {target} lies outside the folder {base} (after resolving symlinks and '..'); "
                    "move the file into that folder, or allow files outside it explicitly "
                    "(allow_outside_files=True)")
    return target


def open_regular_file(path: str | os.PathLike, cap: int, *, error: type[Exception], what: str) -> BinaryIO:
    """Open ``path`` for reading if it is a regular file of at most ``cap`` bytes.

    Devices, pipes, sockets and folders are refused before they are opened; the file is
    opened non-blocking and checked again on the open handle (so a swap in between is
    caught). The caller reads at most ``cap`` + 1 bytes (see :func:`read_regular_file`).
    """
    path = os.fspath(path)
    try:
        info = os.stat(path)
    except FileNotFoundError:
        raise error(f"{what}: no file {path}") from None
    except (OSError, ValueError) as err:
        raise error(f"{what}: cannot read {path} ({getattr(err, 'strerror', None) or type(err).__name__})") from None
    if not stat.S_ISREG(info.st_mode):
        raise error(f"{what}: {path} is {_kind_of(info.st_mode)}, not a regular file; name an ordinary file")
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_NOCTTY", 0))
    except OSError as err:
        raise error(f"{what}: cannot open {path} ({err.strerror})") from None
    info = os.fstat(fd)
    if not stat.S_ISREG(info.st_mode) or info.st_size > cap:
        os.close(fd)
        problem = (f"is {_kind_of(info.st_mode)}, not a regular file" if not stat.S_ISREG(info.st_mode)
                   else f"has {info.st_size} bytes, more than the {size_text(cap)} limit for this kind of file")
        raise error(f"{what}: {path} {problem}")
    return os.fdopen(fd, "rb")


def read_regular_file(path: str | os.PathLike, cap: int, *, error: type[Exception], what: str) -> bytes:
    """All bytes of a regular file of at most ``cap`` bytes (see :func:`open_regular_file`)."""
    with open_regular_file(path, cap, error=error, what=what) as handle:
        data = handle.read(cap + 1)
    if len(data) > cap:  # the file grew after the size check
        raise error(f"{what}: {os.fspath(path)} has more than the {size_text(cap)} limit for this kind of file")
    return data
