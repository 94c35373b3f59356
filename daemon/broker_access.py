"""What the broker connection needs from disk, checked before anything connects.

The password file (refused when group or others may read it, or when it is empty) and the
client TLS context. The worker checks them before it starts the link process, so a bad
password file or certificate stops ``edgeprop run`` at once with exit code 2 and a message
naming the key; the link process reads them again to connect. ``edgeprop check`` runs the same
loading through ``link_file_problems``, so it passes only what ``run`` accepts.
"""
from __future__ import annotations

import os
import ssl
import stat

from daemon.errors import ConfigError
from daemon.file_stamps import Stamp, file_stamps
from daemon.settings import BrokerSettings, TlsSettings


def read_password_file(path: str) -> str:
    """The broker password from ``path``, refusing a file that group or others can access."""
    try:
        fd = os.open(path, os.O_RDONLY | os.O_CLOEXEC)
    except OSError as exc:
        raise ConfigError([f"broker.password_file: cannot open {path!r}: {exc.strerror}"]) from exc
    with os.fdopen(fd, "rb") as handle:
        mode = stat.S_IMODE(os.fstat(handle.fileno()).st_mode)
        if mode & 0o077:
            raise ConfigError([
                f"broker.password_file: {path!r} has mode {mode:04o}, so group or others may "
                f"read the broker password; run `chmod 600 {path}` (owner read/write only)"])
        data = handle.read()
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError([f"broker.password_file: {path!r} is not UTF-8 text"]) from exc
    for ending in ("\r\n", "\n"):          # editors add one trailing newline; strip just that
        if text.endswith(ending):
            text = text[: -len(ending)]
            break
    if "\n" in text or "\r" in text:
        # a blank line after the password, or two lines: never meant (no broker password
        # holds a line break), and the broker would answer only "not authorized"
        raise ConfigError([f"broker.password_file: {path!r} holds more than one line; write the "
                           f"broker password alone on its first line"])
    if not text:      # never meant: the broker would refuse it with a bare "not authorized"
        raise ConfigError([f"broker.password_file: {path!r} is empty; write the broker password "
                           f"into it"])
    return text


def tls_context(tls: TlsSettings) -> ssl.SSLContext:
    """A client TLS context: TLS 1.2 or newer, broker certificate and host name verified."""
    problems = []
    try:
        context = ssl.create_default_context(ssl.Purpose.SERVER_AUTH, cafile=tls.ca_file)
    except (OSError, ssl.SSLError) as exc:
        problems.append(f"broker.tls.ca_file: cannot load CA certificates from {tls.ca_file!r}: "
                        f"{exc}; expected the PEM certificate(s) of the CA that signed the "
                        f"broker's certificate")
        # a bare context still tries the client certificate, so both problems show at once
        context = ssl.SSLContext(ssl.PROTOCOL_TLS_CLIENT)
    context.minimum_version = ssl.TLSVersion.TLSv1_2
    problems += _client_certificate_problems(context, tls)
    if problems:
        raise ConfigError(problems)
    return context


def _client_certificate_problems(context: ssl.SSLContext, tls: TlsSettings) -> list[str]:
    if tls.key_file and not tls.cert_file:
        return ["broker.tls.key_file is set but broker.tls.cert_file is not; give both or neither"]
    if not tls.cert_file:
        return []
    try:
        context.load_cert_chain(tls.cert_file, tls.key_file)
    except (OSError, ssl.SSLError) as exc:
        return [f"broker.tls.cert_file/key_file: cannot load client certificate {tls.cert_file!r} "
                f"with key {tls.key_file or tls.cert_file!r}: {exc}; expected the client "
                f"certificate and its private key (unencrypted) as PEM files"]
    return []


def link_file_stamps(settings: BrokerSettings) -> dict[str, Stamp]:
    """Stamps of the password and TLS files the broker link loads (daemon.file_stamps)."""
    tls = settings.tls
    files = {"broker.password_file": settings.password_file}
    if tls is not None:
        files.update({"broker.tls.ca_file": tls.ca_file, "broker.tls.cert_file": tls.cert_file,
                      "broker.tls.key_file": tls.key_file})
    return file_stamps(files)


def check_protocol_and_user(settings: BrokerSettings) -> None:
    if settings.protocol not in ("3.1.1", "5"):
        raise ConfigError([f"broker.protocol: {settings.protocol!r} is not supported; use '3.1.1' or '5'"])
    if settings.password_file and not settings.username:
        raise ConfigError(["broker.password_file is set but broker.username is not; set both"])


def link_file_problems(password_file: str | None, tls: TlsSettings | None) -> list[str]:
    """Every problem loading the password file and TLS files, as ``run`` loads them to connect."""
    problems: list[str] = []
    if password_file:
        try:
            read_password_file(password_file)
        except ConfigError as exc:
            problems += exc.problems
    if tls is not None:
        try:
            tls_context(tls)
        except ConfigError as exc:
            problems += exc.problems
    return problems


def check_link_settings(settings: BrokerSettings) -> None:
    """Raise ConfigError for broker settings no connection could use (protocol, password, TLS files).

    Run by the daemon before it starts the process that holds the connection, so a bad
    password file or certificate stops ``edgeprop run`` at once with exit code 2.
    """
    check_protocol_and_user(settings)
    problems = link_file_problems(settings.password_file, settings.tls)
    if problems:
        raise ConfigError(problems)
