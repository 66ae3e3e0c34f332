"""Where the shipped data live: the demo stacks and the instrument set-ups.

In the source tree they are the top-level folders ``demo_stacks/`` and
``configs/``; an installed package carries them as ``unmix.demo_stacks`` and
``unmix.configs`` (see ``pyproject.toml``). Running from a source checkout
without installing finds the folders directly.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path

_FOLDERS = ("demo_stacks", "configs")


def shipped_dir(name: str) -> Path:
    """The folder `name` ("demo_stacks" or "configs")."""
    if name not in _FOLDERS:
        raise ValueError(f"name must be one of {_FOLDERS}")
    source_tree = Path(__file__).resolve().parents[2] / name
    if source_tree.is_dir():
        return source_tree
    # Installed: a data-only (namespace) package inside unmix.
    spec = importlib.util.find_spec(f"unmix.{name}")
    if spec is None or not spec.submodule_search_locations:
        raise FileNotFoundError(f"the shipped folder {name!r} is missing from this installation; reinstall unmix")
    return Path(list(spec.submodule_search_locations)[0])
