"""Operator commands: through the control socket when the daemon runs, else on state_dir.

Offline, a rollback cannot swap weights in a running process; it copies the
chosen checkpoint as the newest one, so the next start restores it. The
command says which way it acted.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
import time

from .checkpoints import CheckpointStore
from .config import load_config
from .control import DaemonNotRunning, request
from .errors import CheckpointError, ControlError
from .settings import Settings


def operate(command: str, args: argparse.Namespace) -> int:
    """Run one operator command; returns the exit code."""
    settings = load_config(args.config)
    payload = _payload(command, args)
    try:
        reply = request(settings.control_socket, payload)
    except DaemonNotRunning:
        print(f"edgeprop: daemon not running; acting on {os.path.abspath(settings.state_dir)} directly",
              file=sys.stderr)
        return _offline(command, args, settings)
    if not reply.get("ok"):
        raise ControlError(reply.get("error", "daemon refused the request"))
    result = reply["result"]
    if command == "checkpoints":
        _print_table(settings, args.model, in_use=result)
    elif command == "status":
        _print_status(result)
    else:
        print(json.dumps(result, indent=2))
    return 0


def _payload(command: str, args: argparse.Namespace) -> dict:
    if command == "rollback":
        return {"cmd": "rollback", "model": args.model, "to": args.to}
    if command in ("pin", "unpin"):
        return {"cmd": command, "model": args.model, "id": args.id}
    if command == "save-now":
        return {"cmd": "save-now", "model": args.model}
    return {"cmd": "status"}        # status and checkpoints both start from status


def _store(settings: Settings, model: str, write: bool = False) -> CheckpointStore | None:
    """The model's store; None when it has no directory yet (nothing saved so far).

    Reading never tidies: a running daemon's temp file may be in flight. Writing (offline
    only) must be done as the directory's owner, or the daemon could not read what we wrote.
    """
    names = [m.name for m in settings.models]
    if model not in names:
        raise CheckpointError(f"no model named {model!r} in the config; models: {', '.join(names)}")
    directory = os.path.join(settings.state_dir, model)
    if not os.path.isdir(directory):
        if write:
            raise CheckpointError(f"model {model!r} has no checkpoints yet (no directory {directory})")
        return None
    if write:
        _check_owner(directory)
    store = CheckpointStore(directory, settings.checkpoints.keep, tidy=write)
    if write:
        # as the daemon prunes: only what the configured model can load counts towards keep
        from .runtime import ModelRuntime
        (m,) = [m for m in settings.models if m.name == model]
        store.fits = ModelRuntime(m, "", None).refusal
    return store


def _check_owner(directory: str) -> None:
    owner = os.stat(directory).st_uid
    if owner == os.geteuid():
        return
    try:
        import pwd
        name = pwd.getpwuid(owner).pw_name
    except (ImportError, KeyError):
        name = str(owner)
    raise ControlError(f"{directory} belongs to user {name}; files written by another user "
                       f"could not be read by the daemon. Run this as that user, e.g. "
                       f"sudo -u {name} edgeprop ...")


def _offline(command: str, args: argparse.Namespace, settings: Settings) -> int:
    if command == "checkpoints":
        _print_table(settings, args.model, in_use=None)
    elif command == "status":
        print("daemon: not running")
        _print_table(settings, None, in_use=None)
    elif command == "rollback":
        new = _store(settings, args.model, write=True).promote(args.to)
        print(f"{args.model}: checkpoint {args.to} copied as {new}; the next start restores it")
    elif command in ("pin", "unpin"):
        store = _store(settings, args.model, write=True)
        (store.pin if command == "pin" else store.unpin)(args.id)
        print(f"{args.model}: {args.id} {'pinned' if command == 'pin' else 'unpinned'}")
    elif command == "save-now":
        raise ControlError("save-now needs the running daemon (nothing to save while it is stopped)")
    return 0


def _print_table(settings: Settings, only: str | None, in_use: dict | None) -> None:
    models = [m.name for m in settings.models if only in (None, m.name)]
    if only and not models:
        raise CheckpointError(f"no model named {only!r} in the config")
    print(f"{'model':<16} {'id':<24} {'saved (UTC)':<20} {'samples':>9} {'loss':>10} pinned in-use")
    for name in models:
        use = ((in_use or {}).get("models", {}).get(name) or {}).get("checkpoint") if in_use else None
        store = _store(settings, name)
        if store is None:
            print(f"{name:<16} (no checkpoints yet)")
            continue
        for info in store.list():
            when = time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(info.saved_at)) if info.saved_at else "?"
            loss = f"{info.loss:.4g}" if info.loss is not None else "-"
            samples = info.samples if info.samples is not None else "-"
            flag = "yes" if info.id == use else ("-" if in_use is not None else "?")
            bad = "" if info.valid else f"  UNUSABLE: {info.problem}"
            print(f"{name:<16} {info.id:<24} {when:<20} {samples:>9} {loss:>10} "
                  f"{'yes' if info.pinned else '-':<6} {flag}{bad}")


def _print_status(st: dict) -> None:
    print(f"node {st['node']}  pid {st.get('pid')} (broker link {st.get('link_pid')})  broker {'connected' if st.get('broker_connected') else 'DISCONNECTED'}"
          f"  messages {st['messages']}  queue {st.get('queue_depth')} (dropped {st.get('queue_dropped')})")
    if not st.get("broker_connected") and st.get("broker_last_error"):
        print(f"broker: last attempt failed: {st['broker_last_error']} (the journal's "
              f"broker_connect_failed lines say which key to check)")
    if st.get("rejects"):
        print("rejected: " + ", ".join(f"{k}={v}" for k, v in sorted(st["rejects"].items())))
    for name, m in st["models"].items():
        loss = "-" if m["recent_loss"] is None else f"{m['recent_loss']:.4g}"
        print(f"  {name}: samples {m['samples']}  recent loss {loss}  learning rate {m['learning_rate']:.4g}"
              f" (configured {m['configured_learning_rate']:.4g})  checkpoint {m['checkpoint'] or '-'}"
              f"  drift {'ACTIVE' if m['drift_active'] else 'no'}  {m['architecture']}")
        notes = []
        if not m.get("warmed_up", True):
            notes.append(f"warming up: nothing is published before {m.get('warmup_samples')} samples")
        if m.get("skipped"):
            notes.append("target readings skipped since start: "
                         + ", ".join(f"{k}={v}" for k, v in sorted(m["skipped"].items())))
        for note in notes:
            print(f"    {note}")
    print("Predictions are advisory only; never a protective function.")
