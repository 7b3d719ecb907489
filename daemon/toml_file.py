"""Reading a TOML file (configuration, receiver profile) with every failure as one line.

:mod:`tomllib` parses nested arrays and inline tables recursively, so a file nested a few
hundred levels deep raises :class:`RecursionError` with a traceback thousands of lines long; a
huge file would be read whole into memory. :func:`read_toml` answers both, and the usual
faults (missing, unreadable, not UTF-8, not TOML), with one line naming the file.
"""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Any

MAX_BYTES = 1_000_000      # no configuration or profile comes near this


class TomlFileError(ValueError):
    """The file cannot be used; the message is one line naming it."""


def read_toml(path: str | Path, what: str = "file") -> dict[str, Any]:
    """The TOML document at ``path`` as a dict.

    Parameters
    ----------
    path : str or Path
    what : str
        What the file is, for the message (e.g. ``"config file"``).

    Raises
    ------
    TomlFileError
        One line: missing, a folder, unreadable, larger than :data:`MAX_BYTES`, not UTF-8, not
        valid TOML (with tomllib's line and column), or nested too deeply to parse.
    """
    p = Path(path)
    try:
        with open(p, "rb") as fh:
            raw = fh.read(MAX_BYTES + 1)
    except FileNotFoundError:
        raise TomlFileError(f"{what} {p}: not found") from None
    except IsADirectoryError:
        raise TomlFileError(f"{what} {p}: is a folder, expected a TOML file") from None
    except OSError as exc:
        raise TomlFileError(f"{what} {p}: cannot be read ({exc.strerror or exc})") from None
    if len(raw) > MAX_BYTES:
        raise TomlFileError(f"{what} {p}: larger than {MAX_BYTES // 1000} kB; not a "
                            "spinflip TOML file")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise TomlFileError(f"{what} {p}: not UTF-8 text (byte {exc.start})") from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise TomlFileError(f"{what} {p}: not valid TOML ({' '.join(str(exc).split())})") \
            from None
    except RecursionError:
        raise TomlFileError(f"{what} {p}: arrays or tables nested too deeply to read") from None
