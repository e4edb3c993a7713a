"""File formats: model files and product writers, all written atomically.

Every writer goes through :func:`atomic_write`: the bytes land in a temporary
file in the destination folder, are flushed to disk, and replace the target by
``os.replace`` — a reader never sees a half-written file and an interrupted
write never destroys the previous version.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Callable

from .errors import InputError


def atomic_write(path: str | os.PathLike, write: Callable[[Path], None]) -> Path:
    """Call ``write(tmp_path)`` and atomically rename the result onto ``path``.

    ``write`` receives a temporary path in the same folder (same filesystem, so the
    rename is atomic) and must create the file there.  The folder is created if needed.
    """
    target = Path(path)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(f"{target}: cannot create the output folder ({err.strerror})") from None
    if target.is_dir():
        raise InputError(f"{target}: is a folder; give a file name to write")
    fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp" + target.suffix, dir=target.parent)
    os.close(fd)
    tmp = Path(tmp_name)
    try:
        write(tmp)
        with open(tmp, "rb+") as handle:
            os.fsync(handle.fileno())
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()
    return target


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    return atomic_write(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))
