"""Change stamps of the files the daemon loads once (passwords, certificates, keys).

A year unattended outlives a certificate and a password: when one is replaced on disk, the
part that loaded it compares stamps and loads it again, instead of presenting the old one
until someone restarts the service.
"""
from __future__ import annotations

import os
from typing import Mapping, Optional

Stamp = Optional[tuple]


def file_stamps(files: Mapping[str, Optional[str]]) -> dict[str, Stamp]:
    """Per config key with a path: (inode, size, mtime, ctime), or None for a missing file.

    The inode catches a file renamed over the old one, mtime and size an edit in place, and
    ctime a chmod (a too-open file made private again).
    """
    stamps: dict[str, Stamp] = {}
    for key, path in files.items():
        if path:
            try:
                st = os.stat(path)
                stamps[key] = (st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns)
            except OSError:
                stamps[key] = None
    return stamps


def changed_keys(before: Mapping[str, Stamp], now: Mapping[str, Stamp]) -> list[str]:
    """Config keys whose file is not as it was."""
    return [key for key, stamp in now.items() if stamp != before.get(key)]
