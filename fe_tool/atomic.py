"""Writing output files atomically: a temporary file in the same folder, then a rename."""
from __future__ import annotations

import os
import pathlib
import tempfile


def write_text_atomically(path: str | os.PathLike, text: str, mode: int = 0o644) -> pathlib.Path:
    """Write ``text`` to ``path`` so that readers see the old file or the whole new one, never a part."""
    path = pathlib.Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "w", newline="") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, mode)   # mkstemp makes 0600; results are meant to be shared
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path
