"""File and directory arguments of the CLI, checked before the command starts its work.

A wrong path found only after a replay, or reported as "no such file" when it is a directory,
leaves the user guessing; each check says what the path is and what the option expects.
Failures are ``EdgepropError`` (exit 1), as the commands raised them before.
"""
from __future__ import annotations

import os
import stat

from .errors import EdgepropError


def _refuse(option: str, path: str, problem: str, expected: str) -> EdgepropError:
    return EdgepropError(f"{option} {path}: {problem}; expected {expected}")


def input_file(option: str, path: str, expected: str) -> None:
    """Raise unless ``path`` is a regular file this process can read."""
    try:
        mode = os.stat(path).st_mode
    except (FileNotFoundError, NotADirectoryError):
        raise _refuse(option, path, "no such file", expected) from None
    except OSError as exc:
        raise _refuse(option, path, f"cannot reach it ({exc.strerror or exc})", expected) from None
    if stat.S_ISDIR(mode):
        raise _refuse(option, path, "is a directory", expected)
    if not stat.S_ISREG(mode):        # a FIFO or device would block or never end
        raise _refuse(option, path, "is not a regular file", expected)
    try:
        open(path, "rb").close()
    except OSError as exc:
        raise _refuse(option, path, f"cannot read it ({exc.strerror or exc})", expected) from None


def output_file(option: str, path: str, expected: str) -> None:
    """Raise when ``path`` is a directory or its directory does not exist.

    Whether the file may be written is left to the open that writes it.
    """
    if os.path.isdir(path):
        raise _refuse(option, path, "is a directory", expected)
    parent = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(parent):
        raise _refuse(option, path, f"directory {parent} does not exist", expected)


def output_dir(option: str, path: str, expected: str) -> None:
    """Raise when ``path`` exists and is not a directory (a missing one is created later)."""
    if os.path.exists(path) and not os.path.isdir(path):
        raise _refuse(option, path, "exists and is not a directory", expected)
