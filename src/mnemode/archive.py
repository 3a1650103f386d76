"""Inspect a ``.pt2`` program archive before loading it, and sign or verify an export.

A ``.pt2`` file is a zip archive. ``torch.export.load`` unpickles some of its
entries (weights or constants marked ``use_pickle``, custom objects, non-empty
sample inputs), and unpickling runs code named in the file. mnemode's exporter
writes archives in which nothing is pickled: weights and constants are raw
bytes described by JSON, and the sample inputs are left empty. So the loader
refuses any archive that holds an entry outside that tight list, or whose JSON
marks an entry as pickled -- before ``torch.export.load`` sees it.

Signing: an export may carry ``simulator.sig``, the HMAC-SHA256 (RFC 2104) of
the manifest's bytes under a key the user holds. The manifest records the
SHA-256 of every program, so the signature covers the whole export.

This module uses only the standard library: ``scripts/run_exported_simulator.py``
holds a copy of :func:`archive_problem` and :func:`signature_matches` so that it
can check exports without mnemode installed. Keep the two in step.
"""

from __future__ import annotations

import hashlib
import hmac
import io
import json
import re
import zipfile

__all__ = ["archive_problem", "sign", "signature_matches", "SIGNATURE_FILE", "KEY_ENV"]

SIGNATURE_FILE = "simulator.sig"
KEY_ENV = "MNEMODE_SIGNING_KEY"

# Entries a pickle-free torch.export archive holds (below its one top-level folder).
_ALLOWED = re.compile(
    r"(archive_format|archive_version|byteorder|\.data/version|\.data/serialization_id"
    r"|models/\w+\.json|data/weights/\w+_weights_config\.json|data/constants/\w+_constants_config\.json"
    r"|data/weights/weight_\d+|data/constants/tensor_\d+|data/sample_inputs/\w+\.pt)")
_RAW = re.compile(r"data/(weights/weight|constants/tensor)_\d+")


def archive_problem(data: bytes) -> str | None:
    """What in a ``.pt2`` archive would run code when loaded, or ``None`` when nothing would.

    Refused: a file that is not a zip; an entry outside the list above; a
    non-empty sample-inputs entry (torch unpickles it); a weights or constants
    entry that JSON marks ``use_pickle`` or that is not a raw tensor
    (``weight_N``/``tensor_N``); a raw tensor entry that no config describes.
    """
    try:
        archive = zipfile.ZipFile(io.BytesIO(data))
        infos = archive.infolist()
    except (zipfile.BadZipFile, ValueError, OSError):
        return "it is not a zip archive"
    tops = {i.filename.split("/", 1)[0] for i in infos}
    if len(tops) != 1:
        return f"it has {len(tops)} top-level folders; expected one"
    raw_entries, described = set(), set()
    for info in infos:
        name = info.filename.split("/", 1)[1] if "/" in info.filename else ""
        if info.is_dir():
            continue
        if not _ALLOWED.fullmatch(name):
            return f"it holds an unexpected entry {info.filename!r}"
        if name.startswith("data/sample_inputs/") and info.file_size:
            return f"its entry {info.filename!r} holds pickled sample inputs"
        if _RAW.fullmatch(name):
            raw_entries.add(name)
        if name.endswith("_config.json"):
            try:
                config = json.loads(archive.read(info).decode("utf-8"))["config"]
                items = list(config.items())
            except (ValueError, KeyError, TypeError, AttributeError, UnicodeDecodeError):
                return f"its entry {info.filename!r} is not a readable payload description"
            folder = name.rsplit("/", 1)[0]
            for key, meta in items:
                if not isinstance(meta, dict) or meta.get("use_pickle") is not False:
                    return f"its entry {info.filename!r} marks {key!r} as pickled"
                path = f"{folder}/{meta.get('path_name')}"
                if not _RAW.fullmatch(path):
                    return f"its entry {info.filename!r} points {key!r} at {meta.get('path_name')!r}, not a raw tensor"
                described.add(path)
    if raw_entries - described:
        return f"it holds tensor entries no description names: {sorted(raw_entries - described)}"
    return None


def sign(manifest_bytes: bytes, key: bytes) -> str:
    """HMAC-SHA256 of the manifest's bytes under ``key``, as hex."""
    return hmac.new(key, manifest_bytes, hashlib.sha256).hexdigest()


def signature_matches(manifest_bytes: bytes, signature: str, key: bytes) -> bool:
    """Whether ``signature`` (hex) is the HMAC-SHA256 of the manifest under ``key`` (constant-time compare)."""
    return hmac.compare_digest(sign(manifest_bytes, key), signature.strip())
