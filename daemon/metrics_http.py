"""The HTTP endpoint that serves the metrics: loopback by default, optional TLS and basic auth.

prometheus-client serves plain and TLS itself; it has no server-side basic auth, so with
``basic_auth`` set a small WSGI wrapper checks the header (constant-time compare) in front of
``make_wsgi_app`` and wsgiref serves it.
"""
from __future__ import annotations

import base64
import hmac
import os
import re
import socket
import ssl
import stat
import sys
import threading
import time
from dataclasses import dataclass
from typing import Any, Callable, Iterable, Optional
from wsgiref.simple_server import WSGIRequestHandler, WSGIServer, make_server

from prometheus_client import CollectorRegistry, make_wsgi_app, start_http_server
from prometheus_client.exposition import ThreadingWSGIServer

from daemon.errors import ConfigError, EdgepropError
from daemon.file_stamps import changed_keys, file_stamps
from daemon.settings import MetricsAuth, MetricsSettings, MetricsTls


# --- HTTP endpoint ----------------------------------------------------------------------------

def parse_listen(listen: str) -> tuple[str, int]:
    """Split ``HOST:PORT`` (IPv6 as ``[::1]:9740``) into host and port."""
    m = re.fullmatch(r"\[([0-9A-Fa-f:.%a-zA-Z]+)\]:(\d{1,5})|([^:\[\]\s]+):(\d{1,5})", listen)
    port = int(m.group(2) or m.group(4)) if m else -1
    if not m or port > 65535:
        raise ConfigError([f"metrics.listen: {listen!r} is not HOST:PORT (port 0-65535; IPv6 "
                           "as [::1]:9740; use null to turn the endpoint off)"])
    return m.group(1) or m.group(3), port


@dataclass
class MetricsServer:
    """A running metrics endpoint; ``close()`` stops it and frees the port."""

    httpd: WSGIServer
    thread: threading.Thread
    tls: bool

    @property
    def host(self) -> str:
        return str(self.httpd.server_address[0])

    @property
    def port(self) -> int:
        return int(self.httpd.server_address[1])

    @property
    def url(self) -> str:
        host = f"[{self.host}]" if ":" in self.host else self.host
        return f"{'https' if self.tls else 'http'}://{host}:{self.port}/metrics"

    def close(self) -> None:
        """Stop serving and close the listening socket."""
        self.httpd.shutdown()
        self.httpd.server_close()
        self.thread.join(timeout=5)

    shutdown = close


class FailedRequests:
    """One log line per failed connection (plain HTTP to the TLS port, a dropped or silent
    client), at most one every ``every_s`` with a count of the rest, instead of the standard
    library's 20-line traceback each: anyone who can reach the port could fill the journal."""

    def __init__(self, log: Callable[..., None] | None, every_s: float = 60.0) -> None:
        self.log, self.every_s = log, every_s
        self.count = 0                   # all failed requests since start
        self._quiet = 0                  # not logged since the last line
        self._last = -float("inf")
        self._lock = threading.Lock()

    def __call__(self, request: object, client_address: object) -> None:
        """``socketserver``'s ``handle_error``, called inside the handler's ``except``."""
        exc = sys.exc_info()[1]
        with self._lock:
            self.count += 1
            now = time.monotonic()
            if now - self._last < self.every_s:
                self._quiet += 1
                return
            self._last, quiet, self._quiet = now, self._quiet, 0
        if self.log is not None:
            peer = client_address[0] if isinstance(client_address, tuple) else client_address
            self.log("warning", "metrics_request_failed", client=peer,
                     error=f"{type(exc).__name__}: {exc}" if exc else "unknown",
                     not_logged_before=quiet, total=self.count,
                     hint="a scraper using http:// against metrics.tls, or a client that "
                          "dropped or stalled; at most one such line a minute")


def serve(settings: MetricsSettings, registry: CollectorRegistry,
          log: Callable[..., None] | None = None) -> Optional[MetricsServer]:
    """Start the scrape endpoint in a daemon thread; None when ``listen`` is null."""
    if settings.listen is None:
        return None
    host, port = parse_listen(settings.listen)
    tls = settings.tls
    if tls is not None:
        _tls_context(tls.cert_file, tls.key_file)        # fail early, with a clear message
    secret: list[bytes] = []
    try:
        if settings.basic_auth is None:
            # prometheus-client's own server, TLS included (0.26: certfile=/keyfile=).
            httpd, thread = start_http_server(port, host, registry,
                                              certfile=tls.cert_file if tls else None,
                                              keyfile=tls.key_file if tls else None)
            _harden(httpd)
        else:
            secret.append(read_password(settings.basic_auth.password_file).encode())
            app = _basic_auth(make_wsgi_app(registry), settings.basic_auth.username, secret)
            httpd, thread = _start_wsgi(host, port, app, tls)
        httpd.handle_error = FailedRequests(log)     # socketserver looks it up on the instance
        _reload_changed_files_before_accepting(httpd, settings, secret, log)
    except OSError as e:
        raise EdgepropError(f"metrics.listen {settings.listen!r}: cannot listen ({e}); "
                            "choose a free port or set metrics.listen: null") from e
    return MetricsServer(httpd, thread, tls is not None)


def read_password(path: str) -> str:
    """Read a one-line password from a file that only its owner may read."""
    key = "metrics.basic_auth.password_file"
    try:
        if os.stat(path).st_mode & (stat.S_IRWXG | stat.S_IRWXO):
            raise ConfigError([f"{key}: {path} is readable by group/others; chmod 600 it"])
        with open(path, encoding="utf-8") as f:
            password = f.readline().rstrip("\r\n")
    except (OSError, UnicodeDecodeError) as e:
        raise ConfigError([f"{key}: cannot read {path}: {e}"]) from e
    if not password:
        raise ConfigError([f"{key}: {path} is empty; put the password on its first line"])
    return password


def _tls_context(cert_file: str, key_file: str) -> ssl.SSLContext:
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    _load_into(ctx, MetricsTls(cert_file, key_file))
    return ctx


def _load_into(ctx: ssl.SSLContext, tls: MetricsTls) -> None:
    """Load the pair into ``ctx``; on a live context the next accepted connection gets it
    (each connection copies the certificate when it is accepted)."""
    try:
        ctx.load_cert_chain(tls.cert_file, tls.key_file)
    except (OSError, ssl.SSLError) as e:
        raise ConfigError([f"metrics.tls: cannot load cert_file {tls.cert_file} / key_file "
                           f"{tls.key_file}: {e}; expected the server certificate and its private "
                           f"key (unencrypted) as PEM files"]) from e


def resolve_listen_host(listen: str) -> None:
    """Raise ConfigError when the host of ``listen`` does not resolve, as ``serve`` would fail.

    Only the name is looked up: binding the port here could fail merely because the running
    daemon holds it.
    """
    host, port = parse_listen(listen)
    try:
        socket.getaddrinfo(host, port, type=socket.SOCK_STREAM, flags=socket.AI_PASSIVE)
    except (socket.gaierror, UnicodeError) as e:
        reason = getattr(e, "strerror", None) or e
        raise ConfigError([f"metrics.listen: cannot resolve host {host!r} ({reason}); give a "
                           f"host name this machine resolves or an address such as "
                           f"127.0.0.1, or null to turn the endpoint off"]) from None


def endpoint_problems(listen: Optional[str], tls: Optional[MetricsTls],
                      basic_auth: Optional[MetricsAuth]) -> list[str]:
    """Every problem ``serve`` would meet on disk and in name lookup, without starting it.

    ``edgeprop check`` reports these, so a config it passes does not fail at start.
    """
    steps: list[tuple[Callable, tuple]] = []
    if listen is not None:
        steps.append((resolve_listen_host, (listen,)))
    if tls is not None:
        steps.append((_tls_context, (tls.cert_file, tls.key_file)))
    if basic_auth is not None:
        steps.append((read_password, (basic_auth.password_file,)))
    problems: list[str] = []
    for step, args in steps:
        try:
            step(*args)
        except ConfigError as e:
            problems += e.problems
    return problems


def _basic_auth(app: Callable, username: str, secret: list[bytes]) -> Callable:
    """Wrap a WSGI app so only requests with the right Basic credentials reach it.

    ``secret`` holds the password as its one item, so a rotated password file can replace it.
    """
    user_b = username.encode()

    def guarded(environ: dict, start_response: Callable) -> Iterable[bytes]:
        scheme, _, token = environ.get("HTTP_AUTHORIZATION", "").partition(" ")
        try:
            given_user, _, given_pass = base64.b64decode(token.strip(), validate=True
                                                         ).partition(b":")
        except ValueError:
            given_user = given_pass = b""
        user_ok = hmac.compare_digest(given_user, user_b)
        pass_ok = hmac.compare_digest(given_pass, secret[0])  # both compared, always
        if scheme.lower() == "basic" and user_ok and pass_ok:
            return app(environ, start_response)
        start_response("401 Unauthorized",
                       [("WWW-Authenticate", 'Basic realm="edgeprop metrics", charset="UTF-8"'),
                        ("Content-Type", "text/plain; charset=utf-8")])
        return [b"credentials required\n"]
    return guarded


RELOAD_CHECK_S = 1.0        # the files are looked at before an accept at most this often


def _reload_changed_files_before_accepting(httpd: WSGIServer, settings: MetricsSettings,
                                           secret: list[bytes], log: Optional[Callable[..., None]]) -> None:
    """Before accepting a connection, load the certificate, key and password again if their
    files changed (at most once a second): a renewed certificate is served from the next
    scrape on, with no restart. A replacement that does not load is reported once per change
    and the files loaded before stay in use. The pair is loaded into the listening socket's
    own context, which each accepted connection copies from as it is wrapped.
    """
    tls, auth = settings.tls, settings.basic_auth
    files = {"metrics.basic_auth.password_file": auth.password_file if auth else None}
    if tls is not None:
        files.update({"metrics.tls.cert_file": tls.cert_file, "metrics.tls.key_file": tls.key_file})
    say = log or (lambda *a, **k: None)
    seen = {"stamps": file_stamps(files), "at": time.monotonic()}
    accept = httpd.get_request

    def reload_then_accept():
        now = time.monotonic()
        if now - seen["at"] >= RELOAD_CHECK_S:
            seen["at"] = now
            stamps = file_stamps(files)
            changed = changed_keys(seen["stamps"], stamps)
            if changed:
                seen["stamps"] = stamps
                _reload(httpd, tls, auth, secret, changed, say)
        return accept()

    httpd.get_request = reload_then_accept     # socketserver looks it up on the instance


def _reload(httpd: WSGIServer, tls: Optional[MetricsTls], auth: Optional[MetricsAuth],
            secret: list[bytes], changed: list[str], say: Callable[..., None]) -> None:
    try:
        if tls is not None:            # a fresh context first: a bad pair must not touch the live one
            _tls_context(tls.cert_file, tls.key_file)
        password = read_password(auth.password_file).encode() if auth is not None else None
        if tls is not None:
            _load_into(httpd.socket.context, tls)
    except ConfigError as exc:
        say("warning", "metrics_files_unusable", changed=",".join(changed),
            problem="; ".join(exc.problems),
            action="kept the files loaded before; loading again when they change")
        return
    if password is not None:
        secret[0] = password
    say("info", "metrics_files_reloaded", changed=",".join(changed))


class _QuietHandler(WSGIRequestHandler):
    timeout = 10                             # a stalled client cannot hold a thread forever

    def log_message(self, format: str, *args: Any) -> None:
        pass                                 # scrapes every 15 s would flood the journal


def _harden(httpd: WSGIServer) -> None:
    """Keep one silent client from freezing the endpoint (measured: it did, under TLS).

    The TLS handshake otherwise runs inside ``accept()`` on the single serving thread, so a
    client that connects and never speaks blocks every scrape. Deferred, it runs in the
    connection's own thread, bounded by the handler timeout. Both are public attributes of
    the standard library's ``ssl.SSLSocket`` and ``socketserver.BaseServer``.
    """
    if isinstance(httpd.socket, ssl.SSLSocket):
        httpd.socket.do_handshake_on_connect = False
    httpd.RequestHandlerClass = _QuietHandler


def _start_wsgi(host: str, port: int, app: Callable, tls: Any
                ) -> tuple[WSGIServer, threading.Thread]:
    """Serve ``app`` from wsgiref in a daemon thread (the basic-auth path)."""
    family = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM,
                                flags=socket.AI_PASSIVE)[0][0]
    server_class = type("_Server", (ThreadingWSGIServer,), {"address_family": family})
    httpd = make_server(host, port, app, server_class, handler_class=_QuietHandler)
    if tls is not None:
        ctx = _tls_context(tls.cert_file, tls.key_file)
        httpd.socket = ctx.wrap_socket(httpd.socket, server_side=True,
                                       do_handshake_on_connect=False)
    thread = threading.Thread(target=httpd.serve_forever, name="metrics-http", daemon=True)
    thread.start()
    return httpd, thread
