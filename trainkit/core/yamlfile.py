"""A built-in YAML file by name or a user's YAML file by path, read as plain data."""

from __future__ import annotations

from collections.abc import Sequence
from importlib import resources
from pathlib import Path
from typing import Any

from trainkit.core.errors import TrainkitError

__all__ = ["read_named_yaml"]


def read_named_yaml(
    name_or_path: str | Path,
    *,
    builtins: Sequence[str],
    folder: str,
    kind: str,
    error: type[TrainkitError] = TrainkitError,
) -> Any:
    """The data of ``trainkit/configs/<folder>/<name>.yaml`` for a built-in name, else of the file.

    Only plain YAML is read (``yaml.safe_load``): a Python tag is refused as invalid YAML,
    never run. PyYAML is imported here, not at module level, so the core stays light.

    Args:
        name_or_path: a name in ``builtins`` or a path to a YAML file.
        builtins: the built-in names (listed in the error for anything else).
        folder: the folder under ``trainkit/configs`` holding the built-in files.
        kind: what the file holds, for messages (``"class set"``, ``"recipe"``).
        error: the error class raised (a :class:`TrainkitError`).

    Returns:
        The parsed YAML (None for an empty file).

    Raises:
        error: an unknown name that is no file either, a file that is not UTF-8, or text
            that is not valid (safe) YAML; the message names the source.
    """
    import yaml

    source = str(name_or_path)
    if source in builtins:
        text = (
            resources.files("trainkit")
            .joinpath("configs", folder, f"{source}.yaml")
            .read_text(encoding="utf-8")
        )
    else:
        p = Path(name_or_path)
        if not p.is_file():
            raise error(
                f"{kind} {source!r} is neither a built-in {kind} ({', '.join(builtins)}) nor a file"
            )
        try:
            text = p.read_text(encoding="utf-8")
        except UnicodeDecodeError as exc:
            raise error(f"{source}: not UTF-8 text (byte {exc.start}); save it as UTF-8") from None
    try:
        return yaml.safe_load(text)
    except yaml.YAMLError as exc:
        raise error(f"{source}: not valid YAML ({exc})") from None
