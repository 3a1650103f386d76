"""Stored configs are data: which ``_target_`` a run directory's ``config.yaml`` may name.

A run directory received from someone else must be as safe to assess, export or
resume as its tensors-only model files. Hydra's ``instantiate`` calls whatever a
``_target_`` names, so before anything in a stored config is instantiated (or
even imported) the whole tree -- nested nodes and lists included -- is checked
against these rules:

* ``_target_`` naming mnemode's own building blocks is allowed: a class defined
  in ``mnemode.systems``, ``mnemode.closures``, ``mnemode.solvers``, ``mnemode.sources``,
  ``mnemode.fitting`` or ``mnemode.hybrid``, or a system factory function in
  ``mnemode.systems``. The *resolved* object must be defined there, so a path
  such as ``mnemode.fitting.checkpoint.torch.load`` (a re-exported foreign
  function) is refused.
* A ``_target_`` outside mnemode is allowed only if it was in the config the run
  was created with (recorded in ``provenance.json`` when the run started), its
  top-level module is neither part of Python's standard library nor one of the
  libraries mnemode itself runs on, and it resolves to a class defined in that
  same package. A forged ``provenance.json`` therefore still cannot reach
  ``os.system``, ``builtins.open`` or ``torch.load``.
* Hydra's other special keys are refused, except ``_partial_: true`` on a node
  whose target is itself allowed (the ring closure uses it) and
  ``_recursive_: false`` (the custom system builds its nominal field itself; this
  only stops Hydra building nested nodes, and every nested target is checked here
  anyway); mnemode never uses ``_args_`` or ``_convert_``.
* Interpolations (``${...}``) are refused: mnemode writes configs resolved, and a
  resolver such as ``oc.decode`` could build a target at resolution time.

Everything is decided on the raw YAML (``yaml.safe_load``), before OmegaConf or
Hydra sees it.
"""

from __future__ import annotations

import importlib
import inspect
import sys
from pathlib import Path
from typing import Any, Iterable, Iterator

from .errors import ConfigError

__all__ = ["user_targets", "check_stored_config", "check_target", "UnsafeConfig", "SAFE_PACKAGES"]

SAFE_PACKAGES = ("mnemode.systems", "mnemode.closures", "mnemode.solvers", "mnemode.fitting", "mnemode.hybrid",
                 "mnemode.sources")
_FACTORY_PACKAGES = ("mnemode.systems",)
# libraries mnemode runs on: none of them holds a user's physics, and several can run code or touch files
_FOREIGN_DENY = frozenset({
    "torch", "numpy", "scipy", "hydra", "omegaconf", "yaml", "pip", "setuptools", "pkg_resources",
    "_pytest", "pytest", "sklearn", "pandas", "matplotlib", "tensorboard", "torchdiffeq", "onnx",
    "onnxruntime", "onnxscript", "tqdm", "IPython", "mnemode",
})
_ALLOWED_SPECIAL = frozenset({"_target_", "_partial_", "_recursive_"})


class UnsafeConfig(ConfigError):
    """A stored config names something mnemode will not instantiate from a file."""


def _walk(obj: Any, where: str) -> Iterator[tuple[str, Any]]:
    """Every node of a plain YAML tree with its dotted path (lists as ``[i]``)."""
    yield where, obj
    if isinstance(obj, dict):
        for key, value in obj.items():
            yield from _walk(value, f"{where}.{key}" if where else str(key))
    elif isinstance(obj, list):
        for i, value in enumerate(obj):
            yield from _walk(value, f"{where}[{i}]")


def user_targets(tree: Any) -> list[str]:
    """The ``_target_`` strings of a config tree that lie outside mnemode (sorted, unique).

    ``tree`` is a plain container (``OmegaConf.to_container(cfg, resolve=True)``).
    """
    found = set()
    for _, node in _walk(tree, ""):
        if isinstance(node, dict):
            target = node.get("_target_")
            if isinstance(target, str) and not _is_mnemode(target):
                found.add(target)
    return sorted(found)


def _is_mnemode(target: str) -> bool:
    return target == "mnemode" or target.startswith("mnemode.")


def _locate(target: str, where: str):
    """The object a dotted path names, found as Hydra finds it: import the first part, then take
    attributes, importing a submodule only where no attribute of that name exists."""
    parts = target.split(".")
    if not all(p.isidentifier() for p in parts):
        raise UnsafeConfig(where, f"names {target!r}, which is not a dotted Python path",
                           "restore the run's config.yaml as mnemode wrote it.")

    def load(name):
        try:
            return importlib.import_module(name)
        except ImportError:
            return None
        except Exception as exc:  # the module exists but fails while importing
            raise UnsafeConfig(where, f"names {target!r}, whose module {name} fails to import "
                               f"({type(exc).__name__}: {exc})", "fix or reinstall that module.") from None

    obj = load(parts[0])
    if obj is None:
        raise UnsafeConfig(where, f"names {target!r}, which cannot be imported",
                           "install the module the run was created with (PYTHONPATH or pip install).")
    for i, part in enumerate(parts[1:], start=1):
        if hasattr(obj, part):
            obj = getattr(obj, part)
            continue
        sub = load(".".join(parts[: i + 1])) if inspect.ismodule(obj) else None
        if sub is None:
            raise UnsafeConfig(where, f"names {target!r}, which does not exist",
                               "restore the run's config.yaml, or install the module the run was created with.")
        obj = sub
    return obj


def check_target(target: Any, where: str, allowed_user: Iterable[str] = ()) -> None:
    """Refuse ``target`` unless stored configs may instantiate it (rules in the module docstring).

    Raises:
        UnsafeConfig: the target is refused; nothing has been imported for a
            refused foreign target.
    """
    fix = ("mnemode instantiates from a stored config only its own classes and the user classes the run "
           "was created with (see docs/safety.md); restore config.yaml as mnemode wrote it, or start a new run "
           "from your own config.")
    if not isinstance(target, str) or not target:
        raise UnsafeConfig(where, f"is {target!r}; expected a dotted class path", fix)
    if not all(p.isidentifier() for p in target.split(".")):
        raise UnsafeConfig(where, f"names {target!r}, which is not a dotted Python path", fix)
    if _is_mnemode(target):
        obj = _locate(target, where)
        module = getattr(obj, "__module__", "") or ""
        in_safe = any(module == p or module.startswith(p + ".") for p in SAFE_PACKAGES)
        is_factory = inspect.isfunction(obj) and any(module == p or module.startswith(p + ".")
                                                     for p in _FACTORY_PACKAGES)
        if not in_safe or not (inspect.isclass(obj) or is_factory):
            raise UnsafeConfig(where, f"names {target!r}, which resolves to "
                               f"{module or '?'}.{getattr(obj, '__qualname__', type(obj).__name__)}, not a mnemode "
                               "system, closure, solver or fitter", fix)
        return
    if target not in set(allowed_user):
        raise UnsafeConfig(where, f"names {target!r}, which is neither mnemode's own nor a user class this run "
                           "was created with (provenance.json)", fix)
    top = target.split(".")[0]
    if top in sys.stdlib_module_names or top in _FOREIGN_DENY or top.startswith("_"):
        raise UnsafeConfig(where, f"names {target!r} from {top!r}, a standard or infrastructure library, "
                           "which never holds a user's physics", fix)
    obj = _locate(target, where)
    module = getattr(obj, "__module__", "") or ""
    if not inspect.isclass(obj) or module.split(".")[0] != top:
        raise UnsafeConfig(where, f"names {target!r}, which resolves to "
                           f"{module or '?'}.{getattr(obj, '__qualname__', type(obj).__name__)}, not a class "
                           f"defined in the user package {top!r}", fix)


def check_stored_config(tree: Any, source: str | Path, allowed_user: Iterable[str] = ()) -> None:
    """Check every node of a stored config (plain YAML tree) before anything is instantiated.

    Args:
        tree: the YAML file's contents, as ``yaml.safe_load`` returns them.
        source: the file, named in messages.
        allowed_user: the non-mnemode targets recorded when the run was created.

    Raises:
        UnsafeConfig: naming the first refused node by its dotted path.
    """
    allowed_user = list(allowed_user)
    if not isinstance(tree, dict):
        raise UnsafeConfig(str(source), f"holds a {type(tree).__name__}, expected a mapping of settings",
                           "restore config.yaml as mnemode wrote it.")
    for where, node in _walk(tree, ""):
        label = f"{source} [{where or '<root>'}]"
        if isinstance(node, str) and "${" in node:
            raise UnsafeConfig(label, f"holds the interpolation {node!r}; stored configs are written resolved",
                               "restore config.yaml as mnemode wrote it (plain values, no ${...}).")
        if not isinstance(node, dict):
            continue
        for key in node:
            if not isinstance(key, str):
                raise UnsafeConfig(label, f"has the key {key!r}; expected text keys",
                                   "restore config.yaml as mnemode wrote it.")
            if key.startswith("_") and key.endswith("_") and key not in _ALLOWED_SPECIAL:
                raise UnsafeConfig(f"{source} [{where + '.' if where else ''}{key}]",
                                   f"uses the instantiation key {key!r}, which mnemode's configs never use",
                                   "remove it; restore config.yaml as mnemode wrote it.")
        if "_recursive_" in node and (node["_recursive_"] is not False or "_target_" not in node):
            raise UnsafeConfig(label, "has _recursive_ other than false on a node with a target",
                               "remove it; restore config.yaml as mnemode wrote it.")
        if "_partial_" in node:
            if node["_partial_"] not in (True, False) or "_target_" not in node:
                raise UnsafeConfig(label, "has _partial_ without a target of its own",
                                   "remove _partial_; restore config.yaml as mnemode wrote it.")
        if "_target_" in node:
            check_target(node["_target_"], f"{source} [{where + '.' if where else ''}_target_]", allowed_user)
