"""The local control socket: the operator asks, the worker answers between two messages.

Protocol: one JSON object per line over a Unix stream socket, one request per
connection. Requests ``{"cmd": "status"}``, ``{"cmd": "rollback", "model": M,
"to": ID}``, ``{"cmd": "pin" | "unpin", "model": M, "id": ID}``,
``{"cmd": "save-now", "model": M or null}``; replies ``{"ok": true, "result":
...}`` or ``{"ok": false, "error": "..."}``.

The socket thread never touches model state: it queues a ``ControlRequest`` and
waits for the worker thread, which owns the models, to answer it.
"""
from __future__ import annotations

import errno
import json
import os
import queue
import socket
import stat
import threading
from typing import Any, Callable, Optional

from daemon.checkpoints import LogFn, stderr_log
from daemon.errors import ControlError, EdgepropError

MAX_REQUEST_BYTES = 64 * 1024
BUSY = "daemon busy; try again"

# cmd -> required string fields; save-now's model may also be null (all models)
COMMANDS: dict[str, tuple[str, ...]] = {
    "status": (), "rollback": ("model", "to"), "pin": ("model", "id"),
    "unpin": ("model", "id"), "save-now": (),
}


class DaemonNotRunning(ControlError):
    """Nothing answers on the socket; the CLI may act on the state directory itself."""


def check_request(payload: Any) -> Optional[str]:
    """Why ``payload`` is not a valid request, or None if it is."""
    if not isinstance(payload, dict):
        return "request must be a JSON object"
    cmd = payload.get("cmd")
    if cmd not in COMMANDS:
        return f"unknown cmd {cmd!r}; allowed: {', '.join(COMMANDS)}"
    for key in COMMANDS[cmd]:
        if not isinstance(payload.get(key), str) or not payload[key]:
            return f"{cmd} needs a non-empty string {key!r}"
    if cmd == "save-now" and not isinstance(payload.get("model"), (str, type(None))):
        return "save-now 'model' must be a model name or null (all models)"
    return None


class ControlRequest:
    """One request waiting for the worker; the worker claims it, then replies."""

    def __init__(self, payload: dict) -> None:
        self.payload = payload
        self._done = threading.Event()
        self._lock = threading.Lock()
        self._state = "queued"          # queued -> claimed -> answered, or queued -> expired
        self._reply: Optional[dict] = None

    def claim(self) -> bool:
        """Worker side: take the request; False if the asker already gave up."""
        with self._lock:
            if self._state != "queued":
                return False
            self._state = "claimed"
            return True

    def reply(self, obj: dict) -> None:
        """Worker side: hand back the reply object."""
        with self._lock:
            if self._state == "expired":
                return
            self._reply, self._state = obj, "answered"
        self._done.set()

    def wait(self, timeout: float) -> dict:
        """Socket side: the reply, or a busy error if the worker never took it."""
        if self._done.wait(timeout):
            return self._reply  # type: ignore[return-value]
        with self._lock:
            if self._state == "queued":
                # Not taken: mark it so the worker skips it; nothing was done.
                self._state = "expired"
                return {"ok": False, "error": BUSY}
        # Taken and in progress (e.g. an fsync); give it as long again.
        if self._done.wait(timeout):
            return self._reply  # type: ignore[return-value]
        return {"ok": False, "error": "daemon took the request but did not answer in time; "
                                      "check with 'edgeprop status'"}


class ControlServer:
    """Listens on ``path``; queues each request on ``requests`` and calls ``wake``."""

    def __init__(self, path: str, wake: Optional[Callable[[], None]] = None,
                 reply_timeout: float = 4.0, max_request_bytes: int = MAX_REQUEST_BYTES,
                 log: LogFn = stderr_log) -> None:
        self.path = path
        self.log = log
        self.wake = wake or (lambda: None)
        self.reply_timeout = reply_timeout
        self.max_request_bytes = max_request_bytes
        self.requests: "queue.Queue[ControlRequest]" = queue.Queue()
        self._stop = threading.Event()
        self._sock = self._bind()
        self._thread = threading.Thread(target=self._serve, name="edgeprop-control", daemon=True)
        self._thread.start()

    # ----- worker side ---------------------------------------------------------------

    def drain(self, handle: Callable[[dict], Any]) -> int:
        """Answer every queued request with ``handle(payload)``; call between messages."""
        n = 0
        while True:
            try:
                req = self.requests.get_nowait()
            except queue.Empty:
                return n
            if not req.claim():
                continue
            n += 1
            try:
                req.reply({"ok": True, "result": handle(req.payload)})
            except EdgepropError as exc:
                req.reply({"ok": False, "error": str(exc)})
            except Exception as exc:  # a control request must never stop the worker
                self.log("error", "control_request_failed", cmd=req.payload.get("cmd"),
                         error=f"{type(exc).__name__}: {exc}")
                req.reply({"ok": False, "error": f"internal error: {type(exc).__name__}: {exc}"})

    # ----- socket side ---------------------------------------------------------------

    def _bind(self) -> socket.socket:
        self._clear_stale()
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        old = os.umask(0o177)            # created owner-only: no window before the chmod
        try:
            sock.bind(self.path)
        except OSError as exc:
            sock.close()
            raise ControlError(f"cannot create control socket {self.path}: {exc.strerror or exc}") from None
        finally:
            os.umask(old)
        os.chmod(self.path, 0o600)
        sock.listen(8)
        sock.settimeout(0.2)             # lets close() stop the accept loop promptly
        return sock

    def _clear_stale(self) -> None:
        try:
            st = os.lstat(self.path)
        except FileNotFoundError:
            return
        if not stat.S_ISSOCK(st.st_mode):
            raise ControlError(f"{self.path} exists and is not a socket; refusing to replace it")
        try:
            _connect(self.path, 1.0).close()
        except DaemonNotRunning:
            os.unlink(self.path)         # left behind by a daemon that died
            return
        except ControlError as exc:
            raise ControlError(f"{self.path} exists and cannot be probed ({exc}); "
                               f"refusing to replace it") from None
        raise ControlError(f"another edgeprop is running on {self.path}")

    def _serve(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self._sock.accept()
            except socket.timeout:
                continue
            except OSError:
                if self._stop.is_set():
                    return
                continue
            with conn:
                try:
                    self._handle(conn)
                except OSError:
                    pass                 # the asker hung up; nothing to answer
                except Exception as exc:  # keep serving; one bad exchange must not end control
                    self.log("error", "control_exchange_failed", error=f"{type(exc).__name__}: {exc}")

    def _handle(self, conn: socket.socket) -> None:
        conn.settimeout(2.0)
        line, error = _read_line(conn, self.max_request_bytes)
        if line is None and error is None:
            return                       # a liveness probe: connected and left
        if error is None:
            try:
                payload = json.loads(line)
            except (ValueError, UnicodeDecodeError) as exc:
                payload, error = None, f"request is not valid JSON: {exc}"
            else:
                error = check_request(payload)
        if error is not None:
            reply: dict = {"ok": False, "error": error}
        else:
            req = ControlRequest(payload)
            self.requests.put(req)
            self.wake()
            reply = req.wait(self.reply_timeout)
        conn.settimeout(self.reply_timeout)
        conn.sendall(_encode(reply))

    def close(self) -> None:
        """Stop listening and remove the socket file."""
        self._stop.set()
        self._thread.join(timeout=2.0)
        self._sock.close()
        try:
            os.unlink(self.path)
        except FileNotFoundError:
            pass


def _read_line(conn: socket.socket, limit: int) -> tuple[Optional[bytes], Optional[str]]:
    """(line, None), (None, error) or (None, None) when the peer sent nothing."""
    buf = b""
    while b"\n" not in buf:
        if len(buf) > limit:
            return None, f"request larger than {limit} bytes"
        try:
            chunk = conn.recv(65536)
        except socket.timeout:
            return None, "request not finished within 2 s (send one JSON line)"
        if not chunk:
            break
        buf += chunk
    line = buf.split(b"\n", 1)[0]
    if len(line) > limit:
        return None, f"request larger than {limit} bytes"
    return (line, None) if line.strip() else (None, None)


def _encode(reply: dict) -> bytes:
    try:
        return json.dumps(reply).encode() + b"\n"
    except (TypeError, ValueError) as exc:
        return json.dumps({"ok": False, "error": f"internal error: reply not JSON: {exc}"}).encode() + b"\n"


def _connect(path: str, timeout: float) -> socket.socket:
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.settimeout(timeout)
    try:
        sock.connect(path)
    except (FileNotFoundError, ConnectionRefusedError) as exc:
        sock.close()
        if isinstance(exc, FileNotFoundError):
            raise DaemonNotRunning(f"daemon not running (no socket at {path})") from None
        raise DaemonNotRunning(f"daemon not running (socket at {path} does not answer)") from None
    except PermissionError:
        sock.close()
        raise ControlError(f"permission denied on {path}; run as the daemon's user") from None
    except OSError as exc:
        sock.close()
        if exc.errno == errno.ENOTSOCK:
            raise DaemonNotRunning(f"daemon not running ({path} is not a socket)") from None
        raise ControlError(f"cannot connect to {path}: {exc.strerror or exc}") from None
    return sock


def request(path: str, payload: dict, timeout: float = 5.0) -> dict:
    """Send one request to a running daemon and return its reply object."""
    with _connect(path, timeout) as sock:
        try:
            sock.sendall(json.dumps(payload).encode() + b"\n")
            buf = b""
            while b"\n" not in buf:
                chunk = sock.recv(65536)
                if not chunk:
                    break
                buf += chunk
        except socket.timeout:
            raise ControlError(f"no answer from the daemon on {path} within {timeout:g} s") from None
        except OSError as exc:
            raise ControlError(f"control socket {path} failed: {exc.strerror or exc}") from None
    try:
        reply = json.loads(buf.split(b"\n", 1)[0])
    except ValueError:
        raise ControlError(f"daemon sent an unreadable reply on {path}: {buf[:200]!r}") from None
    if not isinstance(reply, dict) or "ok" not in reply:
        raise ControlError(f"daemon sent an unexpected reply on {path}: {reply!r}")
    return reply


def daemon_running(path: str) -> bool:
    """True when something accepts connections on the control socket.

    Raises ControlError when that cannot be told (e.g. permission denied), so a
    caller never edits the state directory under a daemon it could not see.
    """
    try:
        _connect(path, 1.0).close()
    except DaemonNotRunning:
        return False
    return True
