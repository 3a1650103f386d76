"""OmegaConf resolvers the shipped configs use (registered before any config is composed).

``${mnemode_data_name:a,b,...}`` names a run family after the first data file
given (its stem, glob characters dropped): a run on ``obs/tank_*.csv`` is filed
under ``tank``, never under the demo's name. A stem that only names a split
(``train.csv``, ``test_*.csv``) gives way to the folder's name.
"""

from __future__ import annotations

from pathlib import Path

__all__ = ["register_resolvers", "data_run_name"]

_SPLIT_WORDS = {"train", "training", "val", "valid", "validation", "test", "testing", "data", ""}


def data_run_name(*specs) -> str:
    """A run family name from the first data file named: its stem (``obs/tank_*.csv`` → ``tank``)."""
    for spec in specs:
        if spec is None or (isinstance(spec, str) and spec in ("", "???", "None", "null")):
            continue
        items = [spec] if isinstance(spec, (str, Path)) else list(spec)
        if not items:
            continue
        path = Path(str(items[0]))
        stem = path.name.split(".")[0]
        stem = stem.split("*")[0].split("?")[0].split("[")[0].rstrip("_-. ")
        if stem.lower() in _SPLIT_WORDS and path.parent.name not in ("", ".", ".."):
            stem = path.parent.name
        if stem and stem.lower() not in _SPLIT_WORDS:
            return "".join(c if c.isalnum() or c in "-_" else "_" for c in stem)
    return "observations"


def register_resolvers() -> None:
    """Register mnemode's resolvers once (idempotent)."""
    from omegaconf import OmegaConf

    if not OmegaConf.has_resolver("mnemode_data_name"):
        OmegaConf.register_new_resolver("mnemode_data_name", data_run_name)
