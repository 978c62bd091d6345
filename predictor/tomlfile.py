"""Reading a TOML file typed by a person, with errors that name the file and the problem."""
from __future__ import annotations

import tomllib
from pathlib import Path

__all__ = ["read_toml"]


def read_toml(path: str | Path, what: str, error: type[Exception] = ValueError) -> dict:
    """The parsed contents of the TOML file at ``path``.

    Parameters
    ----------
    path : str or Path
    what : str
        What the file is, for the messages (``"constants file"``, ``"configuration file"``).
    error : exception type
        Raised, with a one-line message naming the file, when the file is missing,
        unreadable, not UTF-8 or not valid TOML.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise error(f"{path}: no such {what}") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise error(f"{path}: cannot read the {what} ({exc})") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise error(f"{path}: not valid TOML: {exc}") from None
