"""Atomic file writing: a file is either the old one or the complete new one, never half.

The temporary file beside the target is named ``.<name>.<pid>.<random>.part``; files
written this way get the mode the user's umask gives a new file (not ``mkstemp``'s
0600), and temporary files left by a writer that was killed (its process is gone)
are removed by the next write of the same file.
"""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_path", "write_json", "write_text", "new_file_mode", "clean_stale_parts"]

_LEGACY_PART_AGE_S = 600.0  # parts without a PID in their name: removed once this old


def new_file_mode() -> int:
    """The permission bits a newly created file gets under the current umask (``0o666 & ~umask``)."""
    mask = os.umask(0)
    os.umask(mask)
    return 0o666 & ~mask


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return False  # a part of ours from an earlier write is never still in use
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's live process
        return True
    return True


def clean_stale_parts(path: str | os.PathLike) -> list[Path]:
    """Remove temporary ``.part`` files of ``path`` left by writers that died; returns those removed."""
    import time

    path = Path(path)
    prefix = f".{path.name}."
    removed = []
    try:
        candidates = [p for p in path.parent.iterdir() if p.name.startswith(prefix) and p.name.endswith(".part")]
    except OSError:
        return removed
    for part in candidates:
        middle = part.name[len(prefix):-len(".part")]
        head = middle.split(".", 1)[0]
        try:
            stale = not _pid_alive(int(head)) if "." in middle and head.isdigit() else (
                time.time() - part.stat().st_mtime > _LEGACY_PART_AGE_S)
            if stale:
                part.unlink()
                removed.append(part)
        except OSError:
            continue
    return removed


@contextmanager
def atomic_path(path: str | os.PathLike):
    """Yield a temporary path beside ``path``; on success move it into place atomically.

    The new file gets the umask's mode; stale temporary files of ``path`` are removed first.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    clean_stale_parts(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".part", dir=path.parent)
    try:
        os.fchmod(fd, new_file_mode())
    finally:
        os.close(fd)
    try:
        yield Path(tmp)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def write_text(path, text: str) -> None:
    """Write ``text`` to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_json(path, obj) -> None:
    """Write ``obj`` as indented JSON atomically (NaN written as null)."""
    write_text(path, json.dumps(_clean(obj), indent=2, sort_keys=False) + "\n")


def _clean(obj):
    import math

    if isinstance(obj, float):
        return None if not math.isfinite(obj) else obj
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if hasattr(obj, "item") and getattr(obj, "ndim", 1) == 0:
        return _clean(obj.item())
    if hasattr(obj, "tolist"):
        return _clean(obj.tolist())
    return obj
