"""The long-running process: wires broker, queue, worker, control, metrics and signals.

Threads and who owns what:
  main thread   - signals only: handlers set flags and wake the worker (gunicorn-style)
  worker thread - owns every model; handles messages, ticks, control requests, reloads
  control/metrics threads - socket servers; never touch model state
and one child process (daemon.link_child) holds the broker connection: paho's network thread
there only enqueues readings, and a forwarder passes them over a socket pair to the worker.
"""
from __future__ import annotations

import os
import signal
import threading
import time
from typing import Callable, Mapping

from . import sdnotify
from .checkpoints import CheckpointStore, ensure_private_dir
from .config import diff_settings, load_config
from .control import ControlServer
from .engine import Engine
from .errors import CheckpointError, ConfigError, ControlError, EdgepropError
from .key_files import world_readable_keys
from .link_process import LinkProcess, LinkProcessLost
from .logs import Log
from .metrics import Metrics, serve
from .settings import Settings

READY_WITHOUT_BROKER_S = 20.0   # report ready anyway, so a broker outage at boot is no restart loop
STOP_DEADLINE_S = 4.0           # finish, save and disconnect within this after SIGTERM
HOUSEKEEPING_S = 0.05           # timers, control requests, metrics between messages at most this often


class Flags:
    """Requests from signal handlers to the worker; plain booleans set from one place."""

    def __init__(self) -> None:
        self.stop = False
        self.reload = False


class Service:
    """``edgeprop run``: one instance per process."""

    def __init__(self, config_path: str, settings: Settings, log: Log,
                 clock: Callable[[], float] = time.time, env: Mapping[str, str] | None = None) -> None:
        self.config_path = config_path
        self.settings = settings
        self.log = log
        self.clock = clock
        self.env = dict(os.environ if env is None else env)
        self.flags = Flags()
        self.link: LinkProcess | None = None
        # First of all: a second `edgeprop run` on the same state directory must stop here,
        # before it removes the running daemon's half-written checkpoint as a crash leftover
        # or connects with the same client id (which the broker answers by dropping the other).
        ensure_private_dir(settings.state_dir)
        self.control: ControlServer | None = ControlServer(settings.control_socket, wake=self._wake,
                                                           log=log)
        try:
            self.metrics = Metrics(node=settings.node, queue_capacity=settings.broker.queue_size)
            self.engine = Engine(settings, self._publish, log, self.metrics, clock,
                                 stores=self._stores(settings))
        except BaseException:
            self.close_control()
            raise
        self.http = None
        self._ready = False
        self._info_connection: int | None = None    # link.reconnects when the info last went out
        self._started = time.monotonic()
        self._watchdog_s = sdnotify.watchdog_interval_s(self.env)
        self._last_ping = 0.0
        self.exit_code = 0

    def _wake(self) -> None:
        if self.link is not None:
            self.link.wake()

    def close_control(self) -> None:
        """Remove the control socket (also when start-up fails, so a retry is not refused)."""
        if self.control is not None:
            self.control.close()
            self.control = None

    def _stores(self, settings: Settings) -> dict[str, CheckpointStore]:
        # The state dir is private too (ensured in __init__), not only each model's: whoever
        # may write in it can swap a model's directory or stand in for the control socket.
        return {m.name: CheckpointStore(os.path.join(settings.state_dir, m.name),
                                        settings.checkpoints.keep, clock=self.clock, log=self.log)
                for m in settings.models}

    # -- start and stop --------------------------------------------------------------
    def run(self) -> int:
        """Serve until SIGTERM/SIGINT; returns the process exit code."""
        topics = self.engine.routes.topics
        # a refused password file or certificate ends it here, before any model_* line
        # could suggest that the start got further
        self.link = LinkProcess(self.settings.broker, self.settings.node, topics, log=self.log,
                                log_level=self.settings.logging.level, decoder=self.engine.decoder)
        for warning in world_readable_keys(self.settings):
            self.log("warning", "private_key_readable", detail=warning)
        self.engine.restore_all()
        self.link.start()
        try:
            self.http = serve(self.settings.metrics, self.metrics.registry, log=self.log)
        except BaseException:
            self.link.stop()       # e.g. the metrics port is taken: leave the broker cleanly
            raise
        self._install_signals()
        worker = threading.Thread(target=self._worker, name="edgeprop-worker", daemon=True)
        self.log("info", "started", node=self.settings.node, models=len(self.engine.models),
                 topics=len(topics), metrics=getattr(self.http, "url", None),
                 control=self.settings.control_socket)
        worker.start()
        while worker.is_alive():
            worker.join(0.5)
        return self.exit_code

    def _install_signals(self) -> None:
        def on_stop(signum, frame):
            self.flags.stop = True
            self.link.wake()

        def on_hup(signum, frame):
            self.flags.reload = True
            self.link.wake()

        signal.signal(signal.SIGTERM, on_stop)
        signal.signal(signal.SIGINT, on_stop)
        signal.signal(signal.SIGHUP, on_hup)

    def _publish(self, topic: str, payload: bytes, qos: int, retain: bool) -> object:
        return self.link.publish(topic, payload, qos, retain) if self.link else False

    # -- the worker ---------------------------------------------------------------------
    def _worker(self) -> None:
        try:
            last_housekeeping = 0.0
            while not self.flags.stop:
                items = self.link.receive(timeout=0.2)
                for item in items:
                    self._handle_one(item)
                    if self.flags.stop:
                        break
                self.link.flush_unless_busy()    # this batch's predictions, with the next ones under load
                now = time.monotonic()
                # A wake-up with nothing to read is a signal or a control request: act at once.
                # Otherwise housekeeping every HOUSEKEEPING_S is plenty, and at one message per
                # wake-up it would cost more than the message itself.
                if not items or now - last_housekeeping >= HOUSEKEEPING_S:
                    last_housekeeping = now
                    self._between_messages()
        except LinkProcessLost as exc:
            self.log("error", "link_process_lost", error=str(exc), action="saving and exiting; "
                     "systemd restarts the daemon")
            self.exit_code = 1
        except Exception as exc:  # the one catch-all: log it, still try to shut down cleanly
            self.log("error", "worker_failed", error=f"{type(exc).__name__}: {exc}")
            self.exit_code = 1
        finally:
            self._shutdown()

    def _handle_one(self, item: tuple[str, bytes, float, tuple | None]) -> None:
        topic, payload, arrival_t, outcomes = item
        try:
            self.engine.handle(topic, payload, arrival_t, outcomes)
        except Exception as exc:  # per-message catch: count, log, go on
            self.metrics.rejected("internal_error", None)
            self.engine.say_once("error", "message_failed", ("internal", type(exc).__name__),
                                 topic=topic, error=f"{type(exc).__name__}: {exc}")

    def _between_messages(self) -> None:
        self.engine.tick(self.clock())
        if self.control is not None:
            self.control.drain(self._control)
        if self.flags.reload:
            self.flags.reload = False
            self._reload()
        self._update_transport_metrics()
        self._notify_ready_and_ping()
        if self._ready and self.link.connected and self.link.reconnects != self._info_connection:
            self._publish_info()
        self.link.flush()                  # predict-only ticks, model info, control replies' effects

    def _notify_ready_and_ping(self) -> None:
        if not self._ready and (self.link.connected or
                                time.monotonic() - self._started > READY_WITHOUT_BROKER_S):
            self._ready = True
            self._publish_info()
            sdnotify.notify("READY=1\nSTATUS=" + ("connected to broker" if self.link.connected
                                                 else "broker not reachable yet; retrying"), self.env)
            self.log("info", "ready", broker_connected=self.link.connected)
        now = time.monotonic()
        # systemd arms the watchdog once start-up is complete (READY=1): no pings before that
        if self._ready and self._watchdog_s and now - self._last_ping >= self._watchdog_s / 2:
            self._last_ping = now
            sdnotify.notify("WATCHDOG=1", self.env)

    def _publish_info(self) -> None:
        """The retained model descriptions (with the advisory notice), again after each
        reconnect: a broker restarted without persistence has forgotten them."""
        self.engine.publish_model_info()
        self._info_connection = self.link.reconnects if self.link.connected else None

    def _update_transport_metrics(self) -> None:
        self.metrics.transport(queue_depth=self.link.depth, queue_dropped=self.link.dropped,
                               connected=self.link.connected, reconnects=self.link.reconnects,
                               publish_dropped=self.link.publish_dropped)

    def _reload(self) -> None:
        sdnotify.notify(f"RELOADING=1\nMONOTONIC_USEC={time.monotonic_ns() // 1000}", self.env)
        try:
            new = load_config(self.config_path)
        except ConfigError as exc:
            self.log("error", "reload_refused", reason="invalid config; running config kept",
                     problems=len(exc.problems), first=exc.problems[0] if exc.problems else "")
            for problem in exc.problems[1:]:
                self.log("error", "config_problem", detail=problem)
            self.metrics.reload("invalid")
        else:
            before = self.engine.settings
            refusals = self.engine.apply_settings(new)
            changes = diff_settings(before, self.engine.settings)     # what was applied
            self.log.set_level(self.engine.settings.logging.level)
            self.link.set_log_level(self.engine.settings.logging.level)
            for line in changes:
                self.log("info", "reload_change", change=line)
            for line in refusals:
                self.log("warning", "reload_refused_part", detail=line)
            self.metrics.reload("partial" if refusals else "applied")
            self.log("info", "reloaded", changes=len(changes), refused=len(refusals))
        sdnotify.notify("READY=1", self.env)

    def _shutdown(self) -> None:
        sdnotify.notify("STOPPING=1", self.env)
        self.log("info", "stopping")
        self.engine.checkpoint_changed("shutdown")
        if self.link is not None:
            self.link.stop(timeout=min(2.0, STOP_DEADLINE_S))
        self.close_control()
        if self.http is not None:
            try:
                self.http.shutdown()
            except Exception:
                pass
        self.log("info", "stopped", exit_code=self.exit_code)

    # -- control requests (run on the worker, between messages) ------------------------------
    def _control(self, req: dict) -> object:
        cmd = req["cmd"]
        if cmd == "status":
            st = self.engine.status()
            st.update(pid=os.getpid(), link_pid=self.link.pid, broker_connected=self.link.connected,
                      broker_last_error=self.link.state.last_error or None,
                      queue_depth=self.link.depth, queue_dropped=self.link.dropped,
                      config=os.path.abspath(self.config_path))
            return st
        if cmd == "rollback":
            return {"model": req["model"], "checkpoint": self.engine.rollback(req["model"], req["to"])}
        if cmd in ("pin", "unpin"):
            rt = self.engine._model(req["model"])
            (rt.store.pin if cmd == "pin" else rt.store.unpin)(req["id"])
            return {"model": req["model"], "id": req["id"], "pinned": cmd == "pin"}
        if cmd == "save-now":
            names = [req["model"]] if req.get("model") else list(self.engine.models)
            ids = {}
            for name in names:
                rt = self.engine._model(name)
                ids[name] = self.engine.checkpoint_model(rt, "operator")
                if ids[name] is None:
                    raise CheckpointError(f"saving {name!r} failed: {rt.last_save_error}")
            return ids
        if cmd == "checkpoints":
            return {name: rt.checkpoint_id for name, rt in self.engine.models.items()}
        raise ControlError(f"unknown command {cmd!r}")


def run_service(config_path: str, log: Log) -> int:
    """Load the config and serve; exit code 2 for bad config, 1 for a runtime failure."""
    try:
        settings = load_config(config_path)
    except ConfigError as exc:
        log("error", "config_invalid", path=config_path, problems=len(exc.problems))
        for p in exc.problems:
            log("error", "config_problem", detail=p)
        return 2
    log.set_level(settings.logging.level)
    service = None
    try:
        service = Service(config_path, settings, log)
        return service.run()
    except ConfigError as exc:
        for p in exc.problems:
            log("error", "config_problem", detail=p)
        return 2
    except (EdgepropError, OSError) as exc:
        log("error", "start_failed", error=str(exc))
        return 1
    finally:
        if service is not None:
            service.close_control()
