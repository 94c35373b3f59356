"""Save and load named arrays as one ``.npz`` with a checksummed JSON header.

The header travels inside the archive (member ``__header__``, UTF-8 JSON as
uint8) so a state file is a single object that is either wholly valid or
refused. Pickle is never used: object arrays are refused on write and on read.
"""
from __future__ import annotations

import hashlib
import io
import json
import os
import zipfile
from typing import IO, Any, Mapping, Union

import numpy as np

FORMAT_VERSION = 1
HEADER_KEY = "__header__"

PathOrFile = Union[str, "os.PathLike[str]", IO[bytes]]


class StateFileError(Exception):
    """A state file is unusable; ``reason`` says which way.

    Reasons: ``missing``, ``truncated``, ``not-npz``, ``pickle``, ``version``,
    ``checksum``, ``header``, ``shape``.
    """

    def __init__(self, reason: str, detail: str) -> None:
        self.reason = reason
        super().__init__(f"state file {reason}: {detail}")


def arrays_digest(arrays: Mapping[str, np.ndarray]) -> str:
    """SHA-256 over names, dtypes, shapes and bytes, in name order."""
    h = hashlib.sha256()
    for name in sorted(arrays):
        a = np.ascontiguousarray(arrays[name])
        h.update(name.encode())
        h.update(a.dtype.str.encode())
        h.update(repr(a.shape).encode())
        h.update(a.tobytes())
    return h.hexdigest()


def write_state(dest: PathOrFile, arrays: Mapping[str, np.ndarray],
                header: Mapping[str, Any]) -> None:
    """Write ``arrays`` and ``header`` (JSON-able) to ``dest`` as one npz."""
    for name, a in arrays.items():
        if name == HEADER_KEY:
            raise ValueError(f"array name {HEADER_KEY!r} is reserved")
        if np.asarray(a).dtype.hasobject:
            raise ValueError(f"array {name!r} holds Python objects; only numeric arrays are saved")
    full = dict(header)
    full["format_version"] = FORMAT_VERSION
    full["sha256"] = arrays_digest(arrays)
    full["shapes"] = {k: list(np.shape(v)) for k, v in arrays.items()}
    raw = np.frombuffer(json.dumps(full, sort_keys=True).encode(), dtype=np.uint8)
    np.savez(dest, **{HEADER_KEY: raw}, **{k: np.asarray(v) for k, v in arrays.items()})


def read_state(src: PathOrFile) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    """Read a state file, verifying format version and checksum."""
    try:
        data = _read_members(src)
    except FileNotFoundError as exc:
        raise StateFileError("missing", str(exc)) from None
    if HEADER_KEY not in data:
        raise StateFileError("header", "no header member; not an edgeprop state file")
    try:
        header = json.loads(data.pop(HEADER_KEY).tobytes().decode())
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise StateFileError("header", f"header is not valid JSON ({exc})") from None
    if not isinstance(header, dict):
        raise StateFileError("header", "header is not a JSON object")
    version = header.get("format_version")
    if version != FORMAT_VERSION:
        raise StateFileError("version", f"format version {version!r}; this build reads {FORMAT_VERSION}")
    if arrays_digest(data) != header.get("sha256"):
        raise StateFileError("checksum", "SHA-256 of the arrays does not match the header")
    return data, header


def _read_members(src: PathOrFile) -> dict[str, np.ndarray]:
    try:
        loaded = np.load(src, allow_pickle=False)
    except FileNotFoundError:
        raise
    except (ValueError, zipfile.BadZipFile, EOFError, OSError) as exc:
        # np.load tries to unpickle anything that is neither .npy nor a zip, so a
        # "pickle" complaint here means "not an archive", not "pickled arrays"
        reason = _damage_reason(src)
        detail = "not a zip/.npz archive" if reason == "not-npz" else str(exc)
        raise StateFileError(reason, detail) from None
    if not isinstance(loaded, np.lib.npyio.NpzFile):
        raise StateFileError("not-npz", "file is a single .npy array, not an .npz archive")
    try:
        with loaded as npz:
            return {name: npz[name] for name in npz.files}
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise StateFileError("pickle", "file holds pickled objects; refused") from None
        raise StateFileError(_damage_reason(src), str(exc)) from None
    except (zipfile.BadZipFile, EOFError, OSError, KeyError) as exc:
        if "CRC" in str(exc):
            raise StateFileError("checksum", f"archive member damaged ({exc})") from None
        raise StateFileError(_damage_reason(src), str(exc)) from None


def _damage_reason(src: PathOrFile) -> str:
    """Tell a cut-off archive from a file that never was one."""
    try:
        if isinstance(src, (str, bytes)) or hasattr(src, "__fspath__"):
            with open(src, "rb") as f:
                head = f.read(4)
        else:
            src.seek(0)
            head = src.read(4)
    except OSError:
        return "truncated"
    return "truncated" if head.startswith(b"PK") else "not-npz"


def state_bytes(arrays: Mapping[str, np.ndarray], header: Mapping[str, Any]) -> bytes:
    """The bytes ``write_state`` would write; for atomic file writers."""
    buf = io.BytesIO()
    write_state(buf, arrays, header)
    return buf.getvalue()
