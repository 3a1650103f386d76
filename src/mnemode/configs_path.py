"""Where the shipped Hydra config tree is (``configs/`` in a checkout, ``mnemode/configs`` installed)."""

from __future__ import annotations

from pathlib import Path

__all__ = ["config_dir"]


def config_dir() -> Path:
    """Absolute path of the config tree shipped as the ``mnemode.configs`` package."""
    import mnemode.configs

    from .resolvers import register_resolvers

    register_resolvers()  # the shipped configs use them; composing needs them first
    return Path(mnemode.configs.__file__).resolve().parent
