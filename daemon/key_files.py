"""Private keys that every user on the machine may read: warned about, not refused.

A key readable by its group is a common arrangement (Debian's ``ssl-cert`` group, mode
0640), so only read access for *others* is reported. It is a warning and not a refusal
because a daemon that stopped starting after an upgrade would cost a plant its
predictions over a file mode; ``check`` and the start-up log both say how to fix it.
"""
from __future__ import annotations

import os
import stat

from .settings import Settings


def world_readable_keys(settings: Settings) -> list[str]:
    """One warning per configured private key file that others may read."""
    keys = []
    tls = settings.broker.tls
    if tls is not None and tls.cert_file:
        # without key_file the private key sits in the certificate file
        keys.append(("broker.tls.key_file", tls.key_file) if tls.key_file
                    else ("broker.tls.cert_file", tls.cert_file))
    if settings.metrics.tls is not None:
        keys.append(("metrics.tls.key_file", settings.metrics.tls.key_file))
    warnings = []
    for key, path in keys:
        try:
            mode = stat.S_IMODE(os.stat(path).st_mode)
        except OSError:
            continue            # a missing or unreadable file is an error reported elsewhere
        if mode & 0o004:
            warnings.append(f"{key}: {path!r} has mode {mode:04o}, so every user on this machine "
                            f"can read the private key; run `chmod 600 {path}` (or 640 with a "
                            f"group the service user is in)")
    return warnings
