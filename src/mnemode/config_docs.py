"""What the shipped config files say about themselves: header comments and per-key comments.

Hydra keeps the values of a YAML file and drops its comments, yet the comments are
where each setting is explained. This reader pairs every ``key: value  # comment``
line with its dotted key path, joins comment-only lines that continue a key's
comment, and keeps a file's leading comment block as its description. It reads
text only (no YAML library, no Hydra), so help screens stay instant.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from pathlib import Path

__all__ = ["Setting", "ConfigDoc", "read_config_doc", "group_options", "default_choices", "config_root"]

_KEY = re.compile(r"^(?P<indent>\s*)(?P<key>[A-Za-z_@/][\w.@/-]*)\s*:(?:\s+(?P<rest>.*))?$")


@dataclass
class Setting:
    """One key of a config file: its dotted path, its value as written, and its comment."""

    key: str
    value: str
    comment: str = ""


@dataclass
class ConfigDoc:
    """A config file's description (its leading comment block) and its settings in file order."""

    path: Path
    description: str = ""
    settings: list[Setting] = field(default_factory=list)
    defaults: list[tuple[str, str, str]] = field(default_factory=list)  # (group, choice, comment)

    @property
    def summary(self) -> str:
        """The first sentence (or line) of the description."""
        text = self.description.split("\n")[0] if self.description else ""
        return text

    def setting(self, key: str) -> Setting | None:
        return next((s for s in self.settings if s.key == key), None)


def config_root() -> Path:
    """The shipped config tree (importing ``mnemode.configs`` loads nothing heavy)."""
    from .configs_path import config_dir

    return config_dir()


def _split_comment(text: str) -> tuple[str, str]:
    """``value  # comment`` → (value, comment); a ``#`` inside quotes or without a space before it stays."""
    quote = None
    for i, ch in enumerate(text):
        if quote:
            if ch == quote:
                quote = None
        elif ch in "'\"":
            quote = ch
        elif ch == "#" and (i == 0 or text[i - 1] in " \t"):
            return text[:i].rstrip(), text[i + 1:].strip()
    return text.rstrip(), ""


def read_config_doc(path: str | Path, skip: tuple[str, ...] = ("hydra",)) -> ConfigDoc:
    """Parse one YAML config file's comments.

    Args:
        path: the file.
        skip: top-level keys whose whole block is left out (Hydra's own settings).

    Returns:
        :class:`ConfigDoc`: the leading comment block (``# @package`` lines left
        out) as ``description``; one :class:`Setting` per key, nested keys as
        dotted paths, with the comment on its line plus any comment-only lines
        right below it that are indented deeper than the key; the ``defaults``
        list as (group, choice, comment).
    """
    path = Path(path)
    doc = ConfigDoc(path)
    lines = path.read_text(encoding="utf-8").splitlines()
    header: list[str] = []
    i = 0
    while i < len(lines) and (lines[i].startswith("#") or not lines[i].strip()):
        text = lines[i].lstrip("#").strip()
        if text and not text.startswith("@package"):
            header.append(text)
        i += 1
    doc.description = " ".join(header)

    stack: list[tuple[int, str]] = []  # (indent, key) of the open mappings
    block: str | None = None            # the top-level block being read ('defaults', a skipped one)
    block_scalar_indent: int | None = None
    last: Setting | None = None
    last_indent = 0
    for raw in lines[i:]:
        if not raw.strip():
            continue
        indent = len(raw) - len(raw.lstrip())
        stripped = raw.strip()
        if block_scalar_indent is not None:
            if indent > block_scalar_indent:
                continue
            block_scalar_indent = None
        if stripped.startswith("#"):
            if last is not None and indent > last_indent and last.comment:
                last.comment += " " + stripped.lstrip("#").strip()
            continue
        if indent == 0:
            block = None
        if stripped.startswith("- "):
            if block == "defaults":
                item, comment = _split_comment(stripped[2:])
                if ":" in item:
                    group, choice = (s.strip() for s in item.split(":", 1))
                    doc.defaults.append((group, choice, comment))
            last = None
            continue
        m = _KEY.match(raw)
        if m is None:
            last = None
            continue
        key = m.group("key")
        value, comment = _split_comment(m.group("rest") or "")
        if indent == 0 and (key == "defaults" or key in skip):
            block = key
            last = None
            continue
        if block is not None:
            continue
        while stack and stack[-1][0] >= indent:
            stack.pop()
        dotted = ".".join([k for _, k in stack] + [key])
        if value in ("|", "|-", ">", ">-"):
            block_scalar_indent = indent
            value = "(text)"
        if value == "":
            stack.append((indent, key))
        setting = Setting(dotted, value, comment)
        doc.settings.append(setting)
        last, last_indent = setting, indent
    return doc


def group_options(group: str, root: str | Path | None = None) -> dict[str, ConfigDoc]:
    """Every option of a config group (file stem → its :class:`ConfigDoc`), sorted by name."""
    folder = Path(root or config_root()) / group
    return {p.stem: read_config_doc(p) for p in sorted(folder.glob("*.yaml"))}


def default_choices(root: str | Path | None = None, config_name: str = "mnemode") -> dict[str, tuple[str, str]]:
    """The primary config's defaults list: group → (choice, comment)."""
    doc = read_config_doc(Path(root or config_root()) / f"{config_name}.yaml")
    return {g: (c, comment) for g, c, comment in doc.defaults if not g.startswith("/")}
