"""The ground floor for everything driftwise writes: atomic files, JSON- and CSV-safe values, the caution text.

Every writer goes through :func:`atomic_write`: the bytes land in a temporary
file in the destination folder, are flushed to disk, and replace the target by
``os.replace`` — a reader never sees a half-written file and an interrupted
write never destroys the previous version.
"""

from __future__ import annotations

import math
import os
import tempfile
from pathlib import Path
from typing import Any, Callable

import numpy as np

from .errors import InputError

CAUTION = (
    "Caution: driftwise is a research tool. Forecasts that may guide spill response, "
    "search or other decisions affecting people or the environment must be validated "
    "locally and defer to the responsible authorities, local codes and licensed practice."
)


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
        os.chmod(tmp, 0o666 & ~_current_umask())  # mkstemp makes 0600; give the usual permissions
        os.replace(tmp, target)
    finally:
        if tmp.exists():
            tmp.unlink()
    return target


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    return atomic_write(path, lambda tmp: tmp.write_text(text, encoding="utf-8"))


def plain(value: Any) -> Any:
    """JSON-able copy: numpy → Python, NaN/inf → None, tuples → lists, unknown objects → str."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return plain(value.tolist())
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return float(value) if math.isfinite(float(value)) else None
    if value is None or isinstance(value, str):
        return value
    return str(value)



def csv_safe_text(text: str) -> str:
    """Text for a CSV cell that a spreadsheet will not run as a formula: a leading = + - @ tab or CR gets a ``'``.

    driftwise never evaluates cell text; this guards whoever opens a CSV driftwise writes (OWASP, CSV
    injection, common practice).  Plain numbers such as ``-3.5`` are left alone.
    """
    text = str(text)
    if text[:1] in ("=", "+", "-", "@", "\t", "\r"):
        try:
            float(text)
            return text
        except ValueError:
            return "'" + text
    return text


