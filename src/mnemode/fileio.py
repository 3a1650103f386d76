"""Atomic file writing: a file is either the old one or the complete new one, never half."""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path

__all__ = ["atomic_path", "write_json", "write_text"]


@contextmanager
def atomic_path(path: str | os.PathLike):
    """Yield a temporary path beside ``path``; on success move it into place atomically."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
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
