"""The one rule for commands that write a file or a folder the user names (``--out``):

an existing file, or an existing folder that is not empty, is replaced only with
``--overwrite``; without it the command stops before writing anything, with one line that
names the path and the flag. ``report``, ``export``, ``config show``, ``show`` and
``sgf export`` follow it.
"""

from __future__ import annotations

import os
from pathlib import Path

from selfplay.errors import ConfigError


def check_output(path: str | os.PathLike[str], overwrite: bool, *, folder: bool = False) -> Path:
    """Refuse ``path`` if writing it would replace something and ``overwrite`` is false.

    ``folder``: the output is a folder (an empty one is fine to write into). Returns the path."""
    p = Path(path)
    if folder:
        if p.exists() and not p.is_dir():
            raise ConfigError(f"--out {str(p)!r} is a file; it must be a folder")
        if not overwrite and p.is_dir() and any(p.iterdir()):
            raise ConfigError(f"--out {str(p)!r} exists and is not empty; pass --overwrite to replace what is in it")
        return p
    if p.is_dir():
        raise ConfigError(f"--out {str(p)!r} is a folder; it must be a file name")
    if not overwrite and p.exists():
        raise ConfigError(f"--out {str(p)!r} exists; pass --overwrite to replace it")
    return p
