"""The daemon's one broker connection: survives broker restarts, never stalls the worker.

paho runs the socket on its own network thread. This module decides how that connection
is made (protocol; credentials and TLS from daemon.broker_access), how it comes back after a failure (capped exponential
backoff with jitter, so a fleet of gateways does not reconnect in lockstep after a broker
restart), what the broker tells others about us (retained status + last will), and it
refuses to let outbound messages pile up in memory when the broker or the link is slow.
"""
from __future__ import annotations

import random
import socket
import sys
import threading
import time
from typing import Callable, Protocol

import paho.mqtt.client as mqtt
from paho.mqtt.enums import CallbackAPIVersion, MQTTErrorCode

from daemon.broker_access import (check_protocol_and_user, link_file_stamps, read_password_file,
                                  tls_context)
from daemon.errors import ConfigError
from daemon.file_stamps import changed_keys
from daemon.mqtt_client import LinkClient
from daemon.settings import BrokerSettings

LogFn = Callable[..., None]


class Jitter(Protocol):
    """Where backoff delays come from: ``random.Random`` or a seeded one in tests."""

    def uniform(self, a: float, b: float) -> float: ...

# Readings are periodic and the next one replaces a lost one, so QoS 0 subscriptions: the
# broker sends no PUBACK round trip per reading (QoS 1 roughly halves paho's receive rate,
# FIELD-NOTES) and with a clean session QoS 1 would not survive a reconnect anyway.
SUBSCRIBE_QOS = 0
STATUS_QOS = 1                 # online/offline must not be lost: QoS 1, retained
CONNECT_TIMEOUT_S = 5.0        # TCP + TLS handshake; also bounds how long stop() can wait
STABLE_S = 10.0                # a connection that lived this long resets the backoff (common practice, no source)


def _stderr_log(level: str, event: str, **fields: object) -> None:
    """Fallback logger: one ``level=... event=... key=value`` line on stderr."""
    parts = [f"level={level}", f"event={event}"]
    for key, value in fields.items():
        text = str(value)
        if not text or any(c in text for c in ' "=\\\n'):
            text = '"' + text.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n") + '"'
        parts.append(f"{key}={text}")
    print(" ".join(parts), file=sys.stderr, flush=True)


# What a connection failure's text says about the config, and the key to look at. Matched on
# the words paho, OpenSSL and the broker use (OpenSSL's alert and reason names; MQTT reason
# strings as paho prints them), first match wins.
_HINTS = (
    (("ALERT_UNKNOWN_CA", "ALERT_BAD_CERTIFICATE", "CERTIFICATE_EXPIRED", "ALERT_CERTIFICATE_REVOKED",
      "ALERT_CERTIFICATE_UNKNOWN", "ALERT_CERTIFICATE_REQUIRED"),
     "the broker refused our client certificate: check broker.tls.cert_file (expired, not yet "
     "valid, or from a CA the broker does not trust)"),
    (("CERTIFICATE_VERIFY_FAILED",),
     "we refused the broker's certificate: check broker.tls.ca_file, and that broker.host is a "
     "name the certificate was issued for"),
    (("WRONG_VERSION_NUMBER", "UNEXPECTED_EOF", "record layer failure", "Connection reset"),
     "TLS and plain TCP mixed up? broker.port must be a TLS listener when broker.tls is set, "
     "and a plain one when it is not"),
    (("Not authorized", "Bad user name or password", "not authorised"),
     "check broker.username and the password in broker.password_file"),
    (("Connection refused",), "nothing listens at broker.host:broker.port (broker down, or the "
                              "wrong port)"),
)


def connect_hint(reason: str, settings: BrokerSettings) -> str | None:
    """A pointer to the config key behind a failed or lost connection; None when unknown."""
    for needles, hint in _HINTS:
        if any(n in reason for n in needles):
            return hint
    if settings.tls is None and "no answer to CONNECT (Unspecified error)" in reason:
        return ("the broker closed the connection without answering: if broker.port is a TLS "
                "listener, set broker.tls")
    return None


def _settled(info: mqtt.MQTTMessageInfo) -> bool:
    """True once a publish left (QoS 0), was acknowledged (QoS 1) or was given up by paho."""
    try:
        return info.is_published()
    except (RuntimeError, ValueError):     # paho raises for messages it dropped, e.g. on reconnect
        return True


class BrokerLink:
    """One MQTT connection: status topic, subscriptions, bounded publishing, self-healing."""

    def __init__(self, settings: BrokerSettings, node: str, subscriptions: list[str],
                 on_message: Callable[[str, bytes, float], None],
                 clock: Callable[[], float] = time.time, log: LogFn | None = None,
                 rng: Jitter | None = None, max_pending: int = 1000,
                 on_state_change: Callable[[], None] | None = None,
                 on_read_done: Callable[[], None] | None = None) -> None:
        check_protocol_and_user(settings)
        if max_pending < 1:
            raise ValueError(f"max_pending must be >= 1, got {max_pending!r}")
        self.settings = settings
        self.status_topic = f"edgeprop/{node}/status"
        self.client_id = settings.client_id or f"edgeprop-{node}"
        self.subscriptions = list(subscriptions)
        self.max_pending = max_pending
        self.reconnects = 0           # successful connects after the first one
        self.connect_failures = 0     # attempts that failed (network, TLS or CONNACK refused)
        self.publish_dropped = 0      # publish() calls refused: not connected or too many unsent
        self.publish_refused = 0      # QoS 1 publishes the broker acknowledged with a failure (MQTT 5)
        self.callback_errors = 0      # on_message raised (the message is lost, the link goes on)
        self.last_error: str | None = None
        self._on_message = on_message
        self._on_state_change = on_state_change or (lambda: None)   # connected or lost, at once
        self._on_read_done = on_read_done     # after each read's messages: a batch ends there
        self._clock = clock
        self._log = log or _stderr_log
        self._rng = rng if rng is not None else random.Random()
        self._lock = threading.Lock()
        self._pending: dict[int, mqtt.MQTTMessageInfo] = {}
        self._connected = threading.Event()
        self._ready = threading.Event()   # connected and subscriptions acknowledged
        self._subscribe_mid: int | None = None
        self._ever_connected = False
        self._connected_at = 0.0
        self._failures = 0                # failed attempts since the last stable connection
        self._refused = ""                # CONNACK refusal reason, until paho reports the disconnect
        self._socket_open = False         # a TCP/TLS socket to the broker exists right now
        self._wake = threading.Event()    # set by stop(): ends a backoff wait at once
        self._stopping = False
        self._started = False
        self._file_stamps = link_file_stamps(settings)   # as loaded by _build_client
        self._client = self._build_client(settings)

    def __repr__(self) -> str:
        return (f"BrokerLink({self.settings.host}:{self.settings.port}, connected={self.connected}, "
                f"reconnects={self.reconnects}, publish_dropped={self.publish_dropped})")

    @property
    def connected(self) -> bool:
        """True while the broker has accepted our connection."""
        return self._connected.is_set()

    def _build_client(self, settings: BrokerSettings) -> LinkClient:
        v5 = settings.protocol == "5"
        client = LinkClient(CallbackAPIVersion.VERSION2, client_id=self.client_id,
                         clean_session=None if v5 else True,
                         protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311, reconnect_on_failure=True)
        client.connect_timeout = CONNECT_TIMEOUT_S
        client.will_set(self.status_topic, "offline", qos=STATUS_QOS, retain=True)
        if settings.username:
            password = read_password_file(settings.password_file) if settings.password_file else None
            client.username_pw_set(settings.username, password)
        if settings.tls is not None:
            client.tls_set_context(tls_context(settings.tls))
        client.on_socket_open = self._handle_socket_open
        client.on_connect = self._handle_connect
        client.on_connect_fail = self._handle_connect_fail
        client.on_disconnect = self._handle_disconnect
        client.on_subscribe = self._handle_subscribe
        client.on_message = self._handle_message
        client.on_publish = self._handle_publish
        client.fast_publish = self._deliver
        if self._on_read_done is not None:
            client.after_read = self._handle_read_done
        return client

    # ---- called by the service -------------------------------------------------------

    def start(self) -> None:
        """Begin connecting in the background; returns at once, even with the broker down."""
        if self._started:
            return
        self._started = True
        s = self.settings
        extra = {"clean_start": True} if s.protocol == "5" else {}
        self._client.reconnect_delay_set(0, 0)     # the backoff is ours: see _retry_later
        self._client.connect_async(s.host, s.port, keepalive=s.keepalive_s, **extra)
        self._client.loop_start()

    def wait_connected(self, timeout: float) -> bool:
        """Wait until connected and subscribed; False if that did not happen within ``timeout`` s."""
        return self._ready.wait(timeout)

    def publish(self, topic: str, payload: bytes | str, qos: int = 0, retain: bool = False) -> bool:
        """Queue one message without blocking; False (counted) when offline or too much is unsent.

        A topic with wildcards raises ValueError (paho's check): that is a programming error.
        """
        if not self._connected.is_set() or not self._has_room():
            with self._lock:
                self.publish_dropped += 1
            return False
        info = self._client.publish(topic, payload, qos=qos, retain=retain)
        if info.rc != MQTTErrorCode.MQTT_ERR_SUCCESS:
            with self._lock:
                self.publish_dropped += 1
            return False
        with self._lock:
            if not _settled(info):
                self._pending[info.mid] = info
        return True

    def publish_batch(self, messages: list[tuple]) -> None:
        """In order: ``publish`` each (topic, payload, qos, retain), and ``publish_packets``
        each (count, packets); written by this thread where it can."""
        with self._client.writing_here():
            for item in messages:
                if len(item) == 2:
                    self.publish_packets(*item)
                else:
                    self.publish(*item)

    def publish_packets(self, count: int, packets: bytes) -> bool:
        """Send ``count`` ready-made QoS 0 PUBLISH packets; False (all counted) when offline
        or when ``max_pending`` writes already wait."""
        if not self._connected.is_set() or not self._client.write_packets(packets, self.max_pending):
            with self._lock:
                self.publish_dropped += count
            return False
        return True

    def stop(self, timeout: float = 2.0) -> None:
        """Publish retained ``offline``, give it up to ``timeout`` s to leave, then disconnect."""
        if not self._started or self._stopping:
            return
        self._stopping = True
        self._wake.set()
        if self._connected.is_set():
            info = self._client.publish(self.status_topic, "offline", qos=STATUS_QOS, retain=True)
            try:
                info.wait_for_publish(timeout)
            except (RuntimeError, ValueError):
                pass            # connection went meanwhile: the broker sends our will instead
        self._client.disconnect()
        self._client.loop_stop()
        if self._client.socket() is not None:
            # disconnect() raced a reconnect in progress: say goodbye again, now single-threaded
            self._client.disconnect()
        self._connected.clear()
        self._ready.clear()

    # ---- bookkeeping ---------------------------------------------------------------------

    def _has_room(self) -> bool:
        """True while fewer than ``max_pending`` publishes are unsent/unacknowledged."""
        with self._lock:
            if len(self._pending) < self.max_pending:
                return True
            # QoS 0 messages lost in a reconnect are marked published without on_publish
            self._pending = {mid: i for mid, i in self._pending.items() if not _settled(i)}
            return len(self._pending) < self.max_pending

    def _retry_later(self, event: str, reason: str) -> None:
        """Log one line for a failed or lost connection, then wait the next backoff delay.

        Runs on paho's network thread, which has nothing else to do while disconnected;
        paho's own wait is set to zero, so this wait is the only one and the logged delay true.
        """
        self.last_error = reason
        # "full jitter": uniform between the floor and a doubling, capped ceiling (M. Brooker,
        # "Exponential Backoff And Jitter", AWS Architecture Blog 2015; cited from memory)
        lo, hi = self.settings.reconnect_min_s, self.settings.reconnect_max_s
        cap = min(hi, lo * 2.0 ** min(self._failures + 1, 40))
        delay = float(self._rng.uniform(lo, cap)) if cap > lo else lo
        self._failures += 1
        self._log("warning", event, reason=reason, retry_in_s=round(delay, 2),
                  hint=connect_hint(reason, self.settings))
        self._wake.wait(delay)          # stop() sets it so shutdown never waits out a backoff
        if not self._stopping:
            self._reload_changed_files()

    def _reload_changed_files(self) -> None:
        """Load the password and TLS files again if any changed on disk since last loaded.

        A year unattended outlives a client certificate, a CA and a password: when the
        broker starts refusing the old ones, the renewed files must be the ones presented
        at the next attempt. Files that do not load (half-copied, wrong mode) are reported
        once per change and the ones loaded before are kept.
        """
        stamps = link_file_stamps(self.settings)
        changed = changed_keys(self._file_stamps, stamps)
        if not changed:
            return
        self._file_stamps = stamps
        s = self.settings
        try:
            password = read_password_file(s.password_file) if s.password_file else None
            context = tls_context(s.tls) if s.tls is not None else None
        except ConfigError as exc:
            self._log("warning", "broker_files_unusable", changed=",".join(changed),
                      problem="; ".join(exc.problems),
                      action="kept the files loaded before; loading again when they change")
            return
        if s.username:
            self._client.username_pw_set(s.username, password)
        if context is not None:
            self._client.replace_tls_context(context)
        self._log("info", "broker_files_reloaded", changed=",".join(changed))

    # ---- paho callbacks (network thread: must not raise) ---------------------------------

    def _handle_socket_open(self, client: mqtt.Client, userdata: object, sock: socket.socket) -> None:
        self._socket_open = True
        try:  # without it the first ~50 small messages wait 40 ms each for Nagle (FIELD-NOTES)
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        except OSError:
            pass

    def _handle_connect(self, client: mqtt.Client, userdata: object, flags: object,
                        reason: object, properties: object) -> None:
        if reason.is_failure:           # CONNACK refused; paho reports the disconnect next
            self._refused = str(reason)
            self.connect_failures += 1
            return
        client.last_read_error = ""
        if self._ever_connected:
            self.reconnects += 1
        self._ever_connected = True
        self._connected_at = time.monotonic()
        self._connected.set()
        self._subscribe_to_all()
        client.publish(self.status_topic, "online", qos=STATUS_QOS, retain=True)
        # logged before the state change is reported, so the daemon's `ready` line (written
        # by the other process once it hears of the connection) never comes before this one
        self._log("info", "broker_connected", host=self.settings.host, port=self.settings.port,
                  protocol=self.settings.protocol, tls=self.settings.tls is not None,
                  client_id=self.client_id, reconnects=self.reconnects)
        self._on_state_change()

    def _subscribe_to_all(self) -> None:
        # clean session: the broker forgot our subscriptions, so send them again every time
        if not self.subscriptions:
            self._ready.set()
            return
        rc, mid = self._client.subscribe([(t, SUBSCRIBE_QOS) for t in self.subscriptions])
        self._subscribe_mid = mid if rc == MQTTErrorCode.MQTT_ERR_SUCCESS else None

    def _handle_connect_fail(self, client: mqtt.Client, userdata: object) -> None:
        self._socket_open = False
        self.connect_failures += 1
        self._retry_later("broker_connect_failed",
                          getattr(client, "last_connect_error", "") or "connection failed")

    def _handle_disconnect(self, client: mqtt.Client, userdata: object, flags: object,
                           reason: object, properties: object) -> None:
        was_up = self._connected.is_set()
        self._connected.clear()
        self._ready.clear()
        if was_up:
            self._on_state_change()
        if self._stopping:
            self._log("info", "broker_disconnected", reason="stopping")
            return
        if not self._socket_open:       # paho can report one closed socket twice
            return
        self._socket_open = False
        if self._refused:
            refused, self._refused = self._refused, ""
            self._retry_later("broker_connect_failed", refused)
            return
        if not was_up:                  # socket opened but no CONNACK came back
            self.connect_failures += 1
            cause = getattr(client, "last_read_error", "") or str(reason)
            text = f"no answer to CONNECT ({cause})"
            tls = self.settings.tls
            if tls is not None and not tls.cert_file:
                # what mosquitto with require_certificate does to a client without one: the
                # handshake completes, then the connection is closed without a word
                text += ("; the broker closed the TLS connection before answering, as brokers "
                         "that require a client certificate do: set broker.tls.cert_file and key_file")
            self._retry_later("broker_connect_failed", text)
            return
        if time.monotonic() - self._connected_at >= STABLE_S:
            self._failures = 0
        from_broker = getattr(flags, "is_disconnect_packet_from_server", False)
        text = str(reason) if from_broker or str(reason) != "Unspecified error" else "connection lost"
        self._retry_later("broker_connection_lost", text)

    def _handle_subscribe(self, client: mqtt.Client, userdata: object, mid: int,
                          reason_codes: list, properties: object) -> None:
        for topic, code in zip(self.subscriptions, reason_codes):
            if code.is_failure:
                self.last_error = f"subscribe {topic}: {code}"
                self._log("error", "broker_subscribe_refused", topic=topic, reason=str(code))
        if mid == self._subscribe_mid:
            self._ready.set()

    def _handle_message(self, client: mqtt.Client, userdata: object, message: mqtt.MQTTMessage) -> None:
        # what paho reads itself: the odd packet that mqtt_frames leaves to it
        self._deliver(message.topic, message.payload)

    def _deliver(self, topic: str, payload: bytes) -> None:
        arrival_t = self._clock()
        try:
            self._on_message(topic, payload, arrival_t)
        except Exception as exc:  # noqa: BLE001 - a bad message must not end the network thread
            self._callback_failed(exc)

    def _handle_read_done(self) -> None:
        try:
            self._on_read_done()
        except Exception as exc:  # noqa: BLE001 - must not end the network thread either
            self._callback_failed(exc)

    def _callback_failed(self, exc: Exception) -> None:
        self.callback_errors += 1
        if self.callback_errors & (self.callback_errors - 1) == 0:   # 1st, 2nd, 4th, 8th ...
            self._log("error", "inbound_callback_failed", error=f"{type(exc).__name__}: {exc}",
                      count=self.callback_errors)

    def _handle_publish(self, client: mqtt.Client, userdata: object, mid: int,
                        reason: object, properties: object) -> None:
        with self._lock:
            self._pending.pop(mid, None)
            if reason.is_failure:
                self.publish_refused += 1
