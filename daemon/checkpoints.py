"""One model's checkpoints on disk: atomic, checksummed, time-sorted, pruned, pinnable.

A checkpoint is a single ``nets.store`` state file ``<id>.npz`` in the model's
directory. It is written to ``.<id>.npz.tmp`` beside it, fsynced, renamed into
place and the directory fsynced, so after a power cut a checkpoint is either
whole or absent. Ids look like ``20261201T101500Z-000042``: UTC time of the
save plus a sequence number that keeps growing across restarts, so the newest
checkpoint is the one whose id sorts last.
"""
from __future__ import annotations

import calendar
import json
import os
import re
import stat
import sys
import time
from dataclasses import dataclass, replace
from typing import Any, Callable, Mapping, Optional

import numpy as np

from daemon.errors import CheckpointError
from nets.store import StateFileError, read_state, state_bytes

LogFn = Callable[..., None]
# Loads a checkpoint's (meta, arrays) into a model; returns why it belongs to other settings
# (nothing loaded) or None, and raises StateFileError when its contents are unusable.
LoadIfFits = Callable[[dict, dict], Optional[str]]
Fits = Callable[[dict], Optional[str]]         # meta -> why it belongs to other settings, or None

ID_RE = re.compile(r"^(\d{8}T\d{6}Z)-(\d{6,})$")
PINS_FILE = "pins.json"
# Keys the store itself writes into the header; meta may not use them.
RESERVED_META = frozenset({"id", "saved_at", "format_version", "sha256", "shapes"})
_FORMAT_KEYS = ("format_version", "sha256", "shapes")

REASON_TEXT = {
    "missing": "the file disappeared while it was being read",
    "truncated": "the file is cut short (interrupted write or full disk)",
    "not-npz": "the file is not a checkpoint archive",
    "pickle": "the file holds pickled Python objects, which are refused for safety",
    "version": "the file was written in a format version this build does not read",
    "checksum": "the arrays do not match their SHA-256 checksum (damaged on disk)",
    "header": "the header is missing or unreadable",
    "shape": "the arrays do not match the shapes in the header",
    "id": "the id inside the file differs from its file name",
    "io": "the file could not be read",
    "content": "the arrays do not fit together (a damaged or hand-edited file)",
    "non_finite": "the file holds non-finite numbers (NaN or infinity)",
}


def stderr_log(level: str, event: str, **fields: Any) -> None:
    """Default logger: one ``level=... event=... key=value`` line on stderr (debug is dropped)."""
    if level == "debug":
        return
    parts = [f"level={level}", f"event={event}"]
    for key, value in fields.items():
        text = str(value)
        parts.append(f"{key}={json.dumps(text) if (' ' in text or not text) else text}")
    print(" ".join(parts), file=sys.stderr, flush=True)


@dataclass(frozen=True)
class CheckpointInfo:
    """What ``edgeprop checkpoints`` shows for one file."""

    id: str
    saved_at: Optional[float]
    samples: Optional[int]
    loss: Optional[float]
    pinned: bool
    valid: bool
    problem: Optional[str]
    path: str


def ensure_private_dir(path: str) -> None:
    """Create ``path`` owner-only if missing; refuse one that every user may write to."""
    try:
        os.makedirs(path, mode=0o700, exist_ok=False)
        os.chmod(path, 0o700)               # makedirs' mode is cut by the umask
    except FileExistsError:
        pass
    except OSError as exc:
        raise CheckpointError(f"cannot create state directory {path}: {exc.strerror or exc}") from None
    try:
        st = os.stat(path)
    except OSError as exc:
        raise CheckpointError(f"cannot inspect state directory {path}: {exc.strerror or exc}") from None
    if not stat.S_ISDIR(st.st_mode):
        raise CheckpointError(f"state path {path} exists but is not a directory")
    if st.st_mode & 0o002:
        raise CheckpointError(
            f"state directory {path} is writable by every user (mode {stat.S_IMODE(st.st_mode):#o}); "
            f"anyone could replace the model's weights. Fix it with: chmod o-w {path}")


def _id_key(cid: str) -> tuple[str, int]:
    m = ID_RE.match(cid)
    assert m is not None
    return m.group(1), int(m.group(2))


def _utc_epoch(stamp: str) -> float:
    return float(calendar.timegm(time.strptime(stamp, "%Y%m%dT%H%M%SZ")))


def _fsync_dir(directory: str) -> None:
    fd = os.open(directory, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


class CheckpointStore:
    """The checkpoints of one model in ``directory`` (``state_dir/<model>``)."""

    def __init__(self, directory: str, keep: int, clock: Callable[[], float] = time.time,
                 log: LogFn = stderr_log, tidy: bool = True) -> None:
        """``tidy=False`` opens an existing directory without creating it or removing crash
        leftovers: for a reader beside a running daemon, whose temp file may be in flight."""
        if keep < 1:
            raise CheckpointError(f"checkpoints.keep must be at least 1, got {keep}")
        self.directory = os.path.abspath(directory)
        self.keep = keep
        self.clock = clock
        self.log = log
        self.skipped_corrupt = 0                 # running total, for the metrics counter
        self.mismatches: list[tuple[str, str]] = []   # (id, reason) from the last load_newest
        # Set by the model's runtime: checkpoints it refuses (saved for another network or
        # optimiser) are never pruned, so going back to the old settings finds them again.
        self.fits: Fits | None = None
        self._infos: dict[str, tuple[tuple[int, int, int], CheckpointInfo, dict]] = {}
        if tidy:
            ensure_private_dir(self.directory)
            self._remove_leftovers()

    # ----- writing -------------------------------------------------------------------

    def save(self, arrays: Mapping[str, np.ndarray], meta: Mapping[str, Any]) -> str:
        """Write a new checkpoint atomically, prune old ones, return its id."""
        clash = RESERVED_META.intersection(meta)
        if clash:
            raise CheckpointError(f"checkpoint meta may not use the reserved keys {sorted(clash)}")
        now = float(self.clock())
        cid = self._next_id(now)
        try:
            data = state_bytes(arrays, {**meta, "id": cid, "saved_at": now})
        except (ValueError, TypeError) as exc:
            raise CheckpointError(f"checkpoint {cid} not written: {exc}") from None
        path = self._path(cid)
        self._write_atomic(path, data)
        self.log("debug", "checkpoint_written", id=cid, path=path, bytes=len(data))
        self._prune(newest=cid)
        return cid

    def promote(self, cid: str) -> str:
        """Save a copy of ``cid`` as the newest checkpoint, so the next start restores it."""
        arrays, meta = self.load(cid)
        refusal = self.fits(meta) if self.fits is not None else None
        if refusal:
            raise CheckpointError(f"checkpoint {cid} was saved for other settings ({refusal}); "
                                  f"the configured model could not start from it")
        meta = {k: v for k, v in meta.items() if k not in RESERVED_META}
        meta["restored_from"] = cid
        return self.save(arrays, meta)

    def _next_id(self, now: float) -> str:
        stamp = time.strftime("%Y%m%dT%H%M%SZ", time.gmtime(now))
        ids = self._ids()
        seq = 0
        if ids:
            last_stamp, last_seq = _id_key(ids[-1])
            seq = last_seq + 1
            # Boxes without a real-time clock boot with an old time and are later set
            # by NTP; never let a new id sort before an older one.
            stamp = max(stamp, last_stamp)
        return f"{stamp}-{seq:06d}"

    def _write_atomic(self, path: str, data: bytes) -> None:
        tmp = os.path.join(self.directory, "." + os.path.basename(path) + ".tmp")
        try:
            fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
            with os.fdopen(fd, "wb") as f:
                f.write(data)
                f.flush()
                os.fsync(f.fileno())
            os.replace(tmp, path)
        except OSError as exc:
            try:
                os.unlink(tmp)
            except OSError:
                pass
            raise CheckpointError(f"could not write {path}: {exc.strerror or exc}; "
                                  f"earlier checkpoints are untouched") from None
        try:
            _fsync_dir(self.directory)
        except OSError as exc:
            self.log("warning", "checkpoint_dir_fsync_failed", path=self.directory, error=exc)

    def _prune(self, newest: str) -> None:
        try:
            keep = set(self.pinned())
        except CheckpointError as exc:
            self.log("error", "checkpoint_prune_skipped", reason=exc)
            return
        # Only checkpoints the running model could load count towards ``keep`` and are
        # deleted: damaged files stay as evidence, other settings' ones stay to go back to.
        ids = [cid for cid in self._ids() if self._usable_here(cid)]
        keep.update(ids[-self.keep:])
        keep.add(newest)
        for cid in ids:
            if cid in keep:
                continue
            try:
                os.unlink(self._path(cid))
                self._infos.pop(cid, None)
                self.log("debug", "checkpoint_pruned", id=cid)
            except OSError as exc:
                self.log("warning", "checkpoint_prune_failed", id=cid, error=exc)

    def _remove_leftovers(self) -> None:
        for name in os.listdir(self.directory):
            if name.startswith(".") and name.endswith(".tmp"):
                try:
                    os.unlink(os.path.join(self.directory, name))
                    self.log("warning", "checkpoint_temp_removed", file=name)
                except OSError as exc:
                    self.log("warning", "checkpoint_temp_remove_failed", file=name, error=exc)

    # ----- reading -------------------------------------------------------------------

    def _path(self, cid: str) -> str:
        return os.path.join(self.directory, cid + ".npz")

    def _ids(self) -> list[str]:
        """Ids of every ``<id>.npz`` present, oldest first."""
        ids = [n[:-4] for n in os.listdir(self.directory)
               if n.endswith(".npz") and ID_RE.match(n[:-4])]
        return sorted(ids, key=_id_key)

    def _usable_here(self, cid: str) -> bool:
        found = self._info_and_meta(cid)
        if found is None or not found[0].valid:
            return False
        return self.fits is None or self.fits(found[1]) is None

    def _read(self, cid: str) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """Read and verify one file; StateFileError says why it is unusable."""
        path = self._path(cid)
        if os.path.isdir(path):
            raise StateFileError("io", f"{path} is a directory, not a checkpoint file")
        try:
            arrays, header = read_state(path)
        except OSError as exc:
            raise StateFileError("io", str(exc)) from None
        if header.get("id", cid) != cid:
            raise StateFileError("id", f"header id {header.get('id')!r}")
        meta = {k: v for k, v in header.items() if k not in _FORMAT_KEYS}
        if "optimizer" not in meta:          # written before headers named it
            meta["optimizer"] = _optimizer_of(arrays)
        return arrays, meta

    def _problem(self, exc: StateFileError) -> str:
        text = REASON_TEXT.get(exc.reason, exc.reason)
        if exc.reason == "truncated" and "CRC" in str(exc):
            # nets.store files a failed zip CRC under "truncated"; it is a damaged byte.
            text = "the file's contents are damaged (zip CRC check failed)"
        return f"{text} ({exc})"

    def load(self, cid: str) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """Arrays and meta of checkpoint ``cid``."""
        ids = self._ids()
        if cid not in ids:
            known = ", ".join(reversed(ids[-10:])) or "none"
            more = f" (newest 10 of {len(ids)})" if len(ids) > 10 else ""
            raise CheckpointError(f"no checkpoint {cid!r} in {self.directory}; known{more}: {known}")
        try:
            return self._read(cid)
        except StateFileError as exc:
            raise CheckpointError(f"checkpoint {cid} is unusable: {self._problem(exc)}") from None

    def load_newest(self, load_if_fits: LoadIfFits) -> Optional[tuple[str, dict[str, np.ndarray], dict]]:
        """Newest checkpoint that reads cleanly and that ``load_if_fits`` loaded."""
        self.mismatches = []
        for cid in reversed(self._ids()):
            try:
                arrays, meta = self._read(cid)
                refusal = load_if_fits(meta, arrays)
            except StateFileError as exc:
                self.skipped_corrupt += 1
                self.log("warning", "checkpoint_skipped", id=cid, reason=exc.reason,
                         detail=self._problem(exc), path=self._path(cid))
                continue
            if refusal:
                self.mismatches.append((cid, refusal))
                self.log("warning", "checkpoint_mismatch", id=cid, reason=refusal)
                continue
            return cid, arrays, meta
        return None

    def list(self) -> list[CheckpointInfo]:
        """Every checkpoint file, newest first, with whether it is usable."""
        pins = self._pins_or_empty()
        out = []
        for cid in reversed(self._ids()):
            info = self._info(cid)
            if info is not None:
                out.append(replace(info, pinned=cid in pins))
        return out

    def _info(self, cid: str) -> Optional[CheckpointInfo]:
        found = self._info_and_meta(cid)
        return found[0] if found else None

    def _info_and_meta(self, cid: str) -> Optional[tuple[CheckpointInfo, dict]]:
        """The listing entry and header of one file, read once per version of the file."""
        path = self._path(cid)
        try:
            st = os.stat(path)
        except FileNotFoundError:
            return None
        sig = (st.st_mtime_ns, st.st_size, st.st_ino)
        cached = self._infos.get(cid)
        if cached and cached[0] == sig:
            return cached[1], cached[2]
        meta: dict = {}
        try:
            _, meta = self._read(cid)
            info = CheckpointInfo(cid, _float(meta.get("saved_at")), _int(meta.get("samples")),
                                  _float(meta.get("loss")), False, True, None, path)
        except StateFileError as exc:
            info = CheckpointInfo(cid, _utc_epoch(_id_key(cid)[0]), None, None, False, False,
                                  self._problem(exc), path)
        self._infos[cid] = (sig, info, meta)
        return info, meta

    def newest_id(self) -> Optional[str]:
        """Id of the newest checkpoint file (usable or not), or None."""
        ids = self._ids()
        return ids[-1] if ids else None

    def id_before(self, t: float) -> Optional[str]:
        """Newest checkpoint the model can load that was saved before time ``t`` (epoch s)."""
        for info in self.list():
            if info.valid and info.saved_at is not None and info.saved_at < t \
                    and self._usable_here(info.id):
                return info.id
        return None

    # ----- pins ----------------------------------------------------------------------

    def pinned(self) -> set[str]:
        """Ids that retention never deletes."""
        path = os.path.join(self.directory, PINS_FILE)
        try:
            with open(path, "rb") as f:
                pins = json.loads(f.read().decode())
        except FileNotFoundError:
            return set()
        except (OSError, ValueError) as exc:
            raise CheckpointError(f"pin list {path} is unreadable ({exc}); fix or delete it") from None
        if not isinstance(pins, list) or not all(isinstance(p, str) for p in pins):
            raise CheckpointError(f"pin list {path} is not a JSON list of ids; fix or delete it")
        return set(pins)

    def _pins_or_empty(self) -> set[str]:
        try:
            return self.pinned()
        except CheckpointError as exc:
            self.log("error", "checkpoint_pins_unreadable", reason=exc)
            return set()

    def pin(self, cid: str) -> None:
        """Keep ``cid`` through retention until unpinned."""
        if cid not in self._ids():
            raise CheckpointError(f"cannot pin {cid!r}: no such checkpoint in {self.directory}")
        self._write_pins(self.pinned() | {cid})

    def unpin(self, cid: str) -> None:
        """Let retention delete ``cid`` again."""
        pins = self.pinned()
        if cid not in pins:
            raise CheckpointError(f"cannot unpin {cid!r}: it is not pinned")
        self._write_pins(pins - {cid})

    def _write_pins(self, pins: set[str]) -> None:
        data = json.dumps(sorted(pins), indent=1).encode()
        self._write_atomic(os.path.join(self.directory, PINS_FILE), data)


def _optimizer_of(arrays: Mapping[str, np.ndarray]) -> Optional[str]:
    """The optimiser whose state a checkpoint holds, told by its array names."""
    if "opt/m" in arrays:
        return "adam"
    if "opt/velocity" in arrays:
        return "sgd"
    return None


def _float(v: Any) -> Optional[float]:
    return float(v) if isinstance(v, (int, float)) and not isinstance(v, bool) else None


def _int(v: Any) -> Optional[int]:
    return int(v) if isinstance(v, int) and not isinstance(v, bool) else None
