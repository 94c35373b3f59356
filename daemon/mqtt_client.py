"""paho's client with the changes the daemon's link needs: fewer system calls, readings read fast.

paho stays in charge of the connection (CONNECT, keepalive, acknowledgements, reconnects);
this subclass changes how bytes move: reads in large chunks, QoS 0 readings taken straight
from those chunks (daemon.mqtt_frames), predictions corked into one segment per batch and
written by the thread that queued them when paho's thread is not using the socket; QoS 0
predictions arrive as finished packets (``write_packets``) and skip paho's message objects.
It leans on paho 2.x internals (``_sock_recv``, ``_sock_close``, ``_packet_write``,
``_in_packet``, ``_out_packet``, ``_sock``, ``_ssl``, ``_sockpairW``, ``_protocol``,
``_msgtime_mutex``, ``_last_msg_out``, ``time_func``, ``_ssl_context``), hence
the cap on paho's version; tests/test_mqtt_link.py runs it against a real broker.
"""
from __future__ import annotations

import socket
import ssl
import threading
from contextlib import contextmanager
from typing import Callable, Iterator

import paho.mqtt.client as mqtt
from paho.mqtt.enums import MQTTErrorCode

from daemon.mqtt_frames import take_publishes

# Linux only. One connection both receives readings and sends predictions, so the kernel
# treats it as interactive and delays its ACKs (up to 40 ms) hoping to piggyback them; the
# broker's Nagle algorithm then holds the next readings until that ACK comes. Measured with
# mosquitto's default config (set_tcp_nodelay false): +25 ms median per reading without this.
_QUICKACK = getattr(socket, "TCP_QUICKACK", None)
_CORK = getattr(socket, "TCP_CORK", None)          # Linux: hold partial segments until unset
READ_CHUNK = 65536             # bytes per recv() from the broker
READ_REFILLS = 16              # recv() calls per select() round at most (1 MiB), then select again


def _set_tcp(sock: socket.socket, option: int, value: int) -> bool:
    """A TCP socket option, best effort: False where the socket refuses it."""
    try:
        sock.setsockopt(socket.IPPROTO_TCP, option, value)
        return True
    except OSError:
        return False


class _Wake:
    """paho's wake-up socket, which a thread about to write its own publishes holds back.

    paho writes a byte to it on every publish so that its thread leaves select() and writes;
    that thread then competes for the interpreter lock with the one publishing, which is
    about to write anyway. paho calls only ``send`` and ``close`` on it.
    """

    def __init__(self, sock: socket.socket) -> None:
        self.sock = sock
        self.local = threading.local()

    def send(self, data: bytes) -> int:
        if getattr(self.local, "held", False):
            self.local.owed = True
            return len(data)
        return self.sock.send(data)

    def close(self) -> None:
        self.sock.close()


class LinkClient(mqtt.Client):
    """paho's client with chunked reads, readings read directly, corked and direct writes;
    it also remembers why the last connection attempt failed (paho drops the reason)."""

    last_connect_error: str = ""
    last_read_error: str = ""   # why the last read failed (cleared by the link on connect)
    _rbuf: bytes = b""          # bytes read from the socket, not yet handed to paho
    _rpos: int = 0
    _refills_left: int = 1
    after_read: Callable[[], None] | None = None   # runs once the packets of one read are handled
    fast_publish: Callable[[str, bytes], None] | None = None   # QoS 0 readings, bypassing paho

    def __init__(self, *args: object, **kwargs: object) -> None:
        super().__init__(*args, **kwargs)
        # Held by paho's thread while it reads, writes, connects or closes; a thread that
        # queued publishes writes them itself only when it gets this lock without waiting.
        self._io = threading.RLock()

    def loop_start(self) -> MQTTErrorCode:
        rc = super().loop_start()
        if self._sockpairW is not None:
            self._sockpairW = _Wake(self._sockpairW)
        return rc

    @contextmanager
    def writing_here(self) -> Iterator[None]:
        """Publishes queued inside this block are written by this thread as it leaves it.

        Unless paho's thread is busy with the socket: then (or if anything is left unsent)
        paho's thread is woken to write as usual. Saves a thread wake-up per batch of
        predictions, and the contest for the interpreter lock that came with it.
        """
        wake = self._sockpairW
        if not isinstance(wake, _Wake):
            yield
            return
        wake.local.held, wake.local.owed = True, False
        try:
            yield
        finally:
            wake.local.held = False
            self._write_now()
            if wake.local.owed and self._out_packet:
                try:
                    wake.sock.send(b"0")
                except BlockingIOError:
                    pass        # full of wake-ups already: paho's thread is awake

    def replace_tls_context(self, context: ssl.SSLContext) -> None:
        """Use ``context`` from the next connection on (renewed certificate or CA files).

        paho's ``tls_set_context`` may be called only once per client; the context it keeps
        is read afresh at every connect, so swapping it between attempts is enough.
        """
        self._ssl_context = context

    def write_packets(self, data: bytes, max_queued: int) -> bool:
        """Send ready-made QoS 0 PUBLISH packets (bytes that need no acknowledgement).

        Written here at once when paho has nothing queued and its thread is not using the
        socket (plain TCP only, as in ``_write_now``); otherwise, and for what the socket
        did not take, queued on paho's own queue behind what is there (order kept) and
        paho's thread woken. False (nothing sent) when ``max_queued`` packets already wait.
        A connection that breaks loses them, as paho loses QoS 0 publishes.
        """
        if not self._ssl and self._io.acquire(blocking=False):
            try:
                if self._sock is not None and not self._out_packet:
                    try:
                        sent = self._sock.send(data)
                    except BlockingIOError:
                        sent = 0
                    except OSError:
                        return True         # lost with the connection; paho's thread sees why
                    if sent:
                        with self._msgtime_mutex:   # paho's keepalive: no ping needed yet
                            self._last_msg_out = mqtt.time_func()
                    if sent == len(data):
                        return True
                    # the rest goes first in paho's (empty) queue before this thread lets go
                    self._queue_raw(data[sent:])
                    self._wake_paho()
                    return True
            finally:
                self._io.release()
        if len(self._out_packet) >= max_queued:
            return False
        self._queue_raw(data)
        self._wake_paho()
        return True

    def _queue_raw(self, data: bytes) -> None:
        # command 0: paho's _packet_write then only writes the bytes (a PUBLISH entry would
        # make it look for a message-info object to mark published); reconnect() clears it
        self._out_packet.append({"command": 0, "mid": 0, "qos": 0, "pos": 0,
                                 "to_process": len(data), "packet": data, "info": None})

    def _wake_paho(self) -> None:
        wake = self._sockpairW
        if wake is None:
            return
        try:
            (wake.sock if isinstance(wake, _Wake) else wake).send(b"0")
        except (BlockingIOError, OSError):
            pass        # full of wake-ups already (paho's thread is awake), or closed

    def _write_now(self) -> None:
        # Plain TCP only: one TLS connection must not read in one thread and write in
        # another. Errors are left to paho's thread, which meets them on its next round.
        if self._ssl or not self._io.acquire(blocking=False):
            return
        try:
            if self._sock is not None and self._out_packet and self.is_connected():
                with self._corked():
                    self._packet_write()
        finally:
            self._io.release()

    def loop_read(self, max_packets: int = 1) -> MQTTErrorCode:
        with self._io:
            return self._read_round(max_packets)

    def _read_round(self, max_packets: int) -> MQTTErrorCode:
        # paho reads one packet per select() and each packet in ~3 small recv() calls, each of
        # which gives up the GIL; with the worker thread busy, every give-up costs this thread
        # a wait for the GIL. So read big chunks (_sock_recv) and hand paho every packet they
        # hold before going back to select(): +30-40 % sustained msg/s (tests/bench_daemon.py).
        self._refills_left = READ_REFILLS
        rc = super().loop_read(max_packets)
        while rc == MQTTErrorCode.MQTT_ERR_SUCCESS and self._rpos < len(self._rbuf):
            rc = super().loop_read(max_packets)
        if self.after_read is not None:
            self.after_read()
        if _QUICKACK is not None and self._sock is not None:
            # acknowledge what was just read now (see _QUICKACK); the flag is not sticky
            _set_tcp(self._sock, _QUICKACK, 1)
        return rc

    def loop_write(self) -> MQTTErrorCode:
        with self._io, self._corked():
            return super().loop_write()

    @contextmanager
    def _corked(self) -> Iterator[None]:
        # paho sends each queued packet with its own send(); with Nagle off each becomes a
        # segment the kernel carries to the broker at once, most of a publish's cost here.
        # Corked, the predictions of one batch leave as one segment when the cork is pulled.
        sock = self._sock
        cork = (_CORK is not None and sock is not None and len(self._out_packet) > 1
                and _set_tcp(sock, _CORK, 1))
        try:
            yield
        finally:
            if cork and self._sock is sock:
                _set_tcp(sock, _CORK, 0)

    def _sock_recv(self, bufsize: int) -> bytes:
        # paho's only reader (_packet_read) asks for 1 byte, 1 byte, then the rest of a packet
        if bufsize == 1 and self.fast_publish is not None and self._in_packet["command"] == 0:
            self._take_publishes()      # at a packet boundary: readings first, paho the rest
        buf, pos = self._rbuf, self._rpos
        if pos >= len(buf):
            buf = self._refill()
            if len(buf) <= bufsize:          # also b"" at end of stream: paho sees it closed
                self._rbuf, self._rpos = b"", 0
                return buf
            pos = 0
            self._rbuf = buf
        self._rpos = pos + bufsize
        return buf[pos:pos + bufsize]

    def _take_publishes(self) -> None:
        """Deliver the whole QoS 0 PUBLISH packets at the front of the buffer, refilling it
        while they use it up; stops before anything else, which paho then reads."""
        v5 = self._protocol == mqtt.MQTTv5
        buf, pos = self._rbuf, self._rpos
        while True:
            pos = self._rpos = take_publishes(buf, pos, v5, self.fast_publish)
            if pos < len(buf) or self._refills_left <= 0:
                return
            buf = self._refill()
            self._rbuf, self._rpos, pos = buf, 0, 0
            if not buf:
                return                               # closed: paho's read of 1 byte sees it

    def _refill(self) -> bytes:
        """The next chunk from the socket; BlockingIOError (paho: back to select()) when none
        is waiting or this round had its READ_REFILLS."""
        if self._refills_left <= 0:
            raise BlockingIOError()
        self._refills_left -= 1
        try:
            return super()._sock_recv(READ_CHUNK)
        except (BlockingIOError, ssl.SSLWantReadError, ssl.SSLWantWriteError):
            raise
        except OSError as exc:
            # paho turns this into "Unspecified error"; keep the cause (a broker's TLS alert
            # about our certificate arrives here, after the handshake) for the log line
            self.last_read_error = f"{type(exc).__name__}: {exc}"
            raise

    def _sock_close(self) -> None:
        with self._io:
            self._rbuf, self._rpos = b"", 0      # bytes of a closed connection mean nothing now
            super()._sock_close()

    def reconnect(self) -> MQTTErrorCode:
        try:
            with self._io:
                return super().reconnect()
        except OSError as exc:
            self.last_connect_error = str(exc) or type(exc).__name__
            raise
        except Exception as exc:  # anything else would end paho's thread and the link for good
            self.last_connect_error = f"{type(exc).__name__}: {exc}"
            raise OSError(self.last_connect_error) from exc
