"""YAML files that ship inside the package (built-in targets and policies), named by file stem.

A command-line or config reference is either such a name (``ws-64x64-4mib``,
``default``) or the path of a user's file; ``names_a_file`` is the one rule that
tells them apart, so targets and policies resolve alike.
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path


def names_a_file(ref: str) -> bool:
    """True when ``ref`` is a path (a folder separator or a .yaml/.yml suffix), not a name."""
    return "/" in ref or "\\" in ref or ref.endswith((".yaml", ".yml"))


def looks_like_path(ref: str) -> bool:
    """``names_a_file``, or an existing file of that name in the current folder."""
    return names_a_file(ref) or Path(ref).is_file()


def bundled_names(package: str, folder: str) -> list[str]:
    """Stems of the ``*.yaml`` files in ``folder`` of ``package``, sorted."""
    root = resources.files(package).joinpath(folder)
    return sorted(p.name[: -len(".yaml")] for p in root.iterdir() if p.name.endswith(".yaml"))


def bundled_bytes(package: str, folder: str, name: str) -> bytes:
    """The bytes of ``folder/name.yaml`` in ``package`` (the caller checked the name)."""
    return resources.files(package).joinpath(folder).joinpath(f"{name}.yaml").read_bytes()
