"""Checkpoints, restarts, corrupt files, rollback and the operator CLI, on real subprocesses.

Every test here runs ``edgeprop run`` as a child process against a real broker and acts on
it the way an operator or a power cut would: SIGKILL, SIGTERM, the ``edgeprop`` CLI, a
damaged file in the state directory.
"""
from __future__ import annotations

import json
import os
import re
import time

import numpy as np

from daemon_proc import (Daemon, PacedPublisher, Probe, bearing_stream, checkpoint_ids, cli,
                         control, model_config, offline_runtime, scrape, wait_until, write_config)

TOPIC = "edgeprop/testnode/m1"


def _restored_line(text: str) -> tuple[str, int]:
    """(id, samples) of the ``model_restored`` line in a daemon log."""
    found = re.search(r"model=m1 event=model_restored id=(\S+) samples=(\d+)", text)
    assert found, f"no model_restored line:\n{text}"
    return found.group(1), int(found.group(2))


def _feed(probe: Probe, n: int, seed: int = 0, wait_for: int | None = None) -> None:
    """Publish ``n`` readings of the test stream and wait until the daemon published ``wait_for``."""
    probe.publish_many(bearing_stream(n, seed=seed), qos=1)
    if wait_for is not None:
        probe.wait_for(lambda: len(probe.predictions()) >= wait_for, what=f"{wait_for} predictions")


def _one_reading(probe: Probe, speed: float, current: float, temp: float) -> None:
    """Speed, current, then the target: the target's features are exactly (speed, current)."""
    probe.publish("site/p1/speed", json.dumps({"value": speed}))
    probe.publish("site/p1/current", repr(current))
    probe.publish("site/p1/bearing_temp", json.dumps({"value": temp}))


# -- 1. checkpoints survive SIGKILL at random moments ------------------------------------------

RATE = 100.0          # targets per second from the paced publisher
EVERY_S = 0.2         # checkpoint timer
KILLS = 30
# Allowance beyond every_s for the batch in hand when the timer falls due and for the box
# stalling the daemon (a judgement for a loaded 2-core box, no source; 0.05 s failed once in
# CI: 24 samples redone, 20 allowed). Still strict enough: with the daemon's timer set to
# 0.4 s the test failed 3 runs of 3, at the 2nd, 12th and 11th kill (34 redone, 30 allowed).
# Each life lasts 0.3-1 s after its first prediction so that it spans several timer periods.
# A save in progress at the kill is allowed for separately, by the longest save the daemons
# logged (``ms=``): two fsyncs, up to 140 ms here now and then.
GRACE_S = 0.1
WARMUP = 50           # model_config's default warmup_samples


def _longest_save_s(text: str) -> float:
    """The longest checkpoint save in a daemon log, in seconds (0 when it saved nothing)."""
    return max((float(ms) / 1000 for ms in re.findall(r"event=checkpoint_saved .* ms=([\d.]+)", text)),
               default=0.0)


def test_sigkill_at_random_moments_always_restarts_from_a_valid_checkpoint(broker, tmp_path):
    """30 SIGKILLs under traffic; each restart resumes from the newest checkpoint on disk.

    "At most one checkpoint interval lost" is checked in samples: the samples redone after a
    restart (last published before the kill minus the restored count) may not exceed the
    predictions the killed daemon published in the last every_s + GRACE_S + (longest save so
    far) seconds before its kill, as timed by the probe. That is the work one interval and one
    save in progress hold at the rate the daemon actually ran (about RATE * every_s = 20 here;
    more if the box stalled it and it then caught up). A timer that saved less often than
    every_s would fail it.
    """
    cfg = write_config(tmp_path, broker, checkpoints={"every_s": EVERY_S, "keep": 5})
    state = str(tmp_path / "state")
    probe = Probe(broker)
    feed = PacedPublisher(probe, RATE)
    rng = np.random.default_rng(20261202)
    redone, allowed, mid_save, save_s = [], [], 0, 0.0
    last_before = window = None
    try:
        for i in range(KILLS):
            newest = checkpoint_ids(state)[-1:] or [None]
            mark = len(probe.payloads(TOPIC))
            d = Daemon(cfg)
            try:
                # counting raw payloads keeps the publisher thread free of JSON parsing
                probe.wait_for(lambda: len(probe.payloads(TOPIC)) > mark, timeout=20,
                               what=f"first prediction after start {i}")
                text = d.log()
                first = json.loads(probe.payloads(TOPIC)[mark])
                if newest[0] is None:
                    assert "event=model_fresh" in text
                else:
                    cid, restored = _restored_line(text)
                    # the newest file on disk is whole: the atomic write never leaves a torn one
                    assert cid == newest[0], (cid, newest, text)
                    assert "checkpoint_skipped" not in text and "level=error" not in text, text
                    # learning continues from the restored counters (a model killed during its
                    # warm-up publishes nothing until it has WARMUP samples) ...
                    assert first["samples"] == max(restored, WARMUP) and first["checkpoint"] == cid
                    # ... and at most one checkpoint interval of samples is redone
                    redone.append(last_before - restored)
                    allowed.append(window)
                    assert redone[-1] <= window, (i, last_before, restored, window)
                time.sleep(float(rng.uniform(0.3, 1.0)))
            finally:
                killed_at = time.monotonic()
                d.proc.kill()
                d.proc.wait(5)
                d.kill()
                save_s = max(save_s, _longest_save_s(d.log()))
            mid_save += any(n.endswith(".tmp") for n in os.listdir(os.path.join(state, "m1")))
            time.sleep(0.1)            # let the broker hand over what the daemon sent before dying
            last_before = json.loads(probe.payloads(TOPIC)[-1])["samples"]
            window = probe.received_since(TOPIC, killed_at - EVERY_S - GRACE_S - save_s)
    finally:
        feed.stop()
        probe.close()
    print(f"\n{KILLS} kills at {RATE:g} samples/s, checkpoint every {EVERY_S} s; samples redone "
          f"after restart: max {max(redone)}, mean {np.mean(redone):.1f}; allowed: "
          f"{min(allowed)}..{max(allowed)}; kills that left a temp file: {mid_save}; "
          f"longest save {1000 * save_s:.1f} ms")
    assert len(redone) == KILLS - 1


# -- 2. damaged checkpoints are skipped for the previous one -----------------------------------

def _three_checkpoints(cfg: str, broker) -> list[str]:
    """Start, learn, save-now twice, stop (which saves a third): returns the ids, oldest first."""
    probe = Probe(broker)
    d = Daemon(cfg)
    try:
        d.wait_ready()
        _feed(probe, 120, wait_for=70)
        first = cli(cfg, "save-now")
        assert first.returncode == 0, first.stderr
        _feed(probe, 30, seed=1, wait_for=100)
        second = cli(cfg, "save-now")
        assert second.returncode == 0, second.stderr
        _feed(probe, 30, seed=2, wait_for=130)
        assert d.stop() == 0
    finally:
        d.kill()
        probe.close()
    ids = checkpoint_ids(os.path.join(os.path.dirname(cfg), "state"))
    assert json.loads(first.stdout)["m1"] == ids[-3] and json.loads(second.stdout)["m1"] == ids[-2]
    return ids[-3:]


def _flip_a_byte_in_the_weights(path: str) -> None:
    """Change one byte inside the stored network parameters (not the zip directory)."""
    data = bytearray(open(path, "rb").read())
    at = data.index(b"net/params")             # the member's name in its local header ...
    at += 200                                  # ... its data follows a little after
    data[at] ^= 0x10
    with open(path, "wb") as f:
        f.write(data)


def test_truncated_and_bit_flipped_checkpoints_are_skipped_logged_and_counted(broker, tmp_path):
    cfg = write_config(tmp_path, broker, metrics={"listen": "127.0.0.1:0"})
    state = str(tmp_path / "state")
    oldest, middle, newest = _three_checkpoints(cfg, broker)
    _, header = offline_runtime(cfg, oldest)

    path = os.path.join(state, "m1", newest + ".npz")
    os.truncate(path, os.path.getsize(path) // 2)              # a write cut short
    _flip_a_byte_in_the_weights(os.path.join(state, "m1", middle + ".npz"))   # a bad sector

    d = Daemon(cfg)
    try:
        text = d.wait_ready()
        assert _restored_line(text) == (oldest, header["samples"])
        skipped = re.findall(r"event=checkpoint_skipped id=(\S+) reason=(\S+) detail=(\"[^\"]*\"|\S+)", text)
        assert [s[0] for s in skipped] == [newest, middle], text
        assert "cut short" in skipped[0][2] and "damaged" in skipped[1][2], skipped
        samples = scrape(d.metrics_url())
        assert samples[("edgeprop_checkpoint_skipped_corrupt_total", (("model", "m1"),))] == 2
        assert control(str(tmp_path / "ctl.sock"), {"cmd": "status"})["models"]["m1"]["checkpoint"] == oldest
        # the damaged files are listed as unusable, not hidden
        table = cli(cfg, "checkpoints")
        assert table.returncode == 0, table.stderr
        rows = {line.split()[1]: line for line in table.stdout.splitlines()[1:]}
        assert "UNUSABLE" in rows[newest] and "UNUSABLE" in rows[middle]
        assert "UNUSABLE" not in rows[oldest] and rows[oldest].split()[-1] == "yes"   # in use
        assert d.stop() == 0
    finally:
        d.kill()


# -- 3. a clean stop and start continues exactly -----------------------------------------------

def test_restart_after_sigterm_continues_samples_and_predicts_identically(broker, tmp_path):
    # predict-only ticks let us ask the same question before and after the restart
    m = model_config(publish={"every_s": 0.2})
    cfg = write_config(tmp_path, broker, models=[m])
    probe = Probe(broker)
    d = Daemon(cfg)
    try:
        d.wait_ready()
        probe.publish_many(bearing_stream(150), qos=1)

        def tick_after_learning():
            preds = probe.predictions()
            measured = [k for k, p in enumerate(preds) if p["measured"] is not None]
            if len(measured) < 100:
                return None
            ticks = [p for p in preds[measured[-1] + 1:] if p["measured"] is None]
            return ticks[-1] if ticks else None
        before = wait_until(tick_after_learning, what="a predict-only tick after the last sample")
        assert d.stop() == 0
        time.sleep(0.2)            # anything the stopped daemon sent is in by now
        restarted_at = time.time()
        text = d.log()
        saved = re.findall(r"model=m1 event=checkpoint_saved id=(\S+) reason=shutdown samples=(\d+)", text)
        assert saved and int(saved[-1][1]) == 150, text
        cid = saved[-1][0]

        mark = len(probe.predictions())
        d = Daemon(cfg)
        text = d.wait_ready()
        assert _restored_line(text) == (cid, 150)
        after = wait_until(lambda: probe.predictions()[mark:], what="a tick after restart")[0]
        assert after["measured"] is None and after["t"] > restarted_at
        # same weights, scalers and input histories: the same prediction, bit for bit
        assert after["predicted"] == before["predicted"]
        assert (after["low"], after["high"]) == (before["low"], before["high"])
        assert after["samples"] == before["samples"] == 150 and after["checkpoint"] == cid

        # and the next measured sample is predicted exactly as the saved model predicts it
        rt, _ = offline_runtime(cfg, cid)
        _one_reading(probe, 1234.5, 14.25, 55.0)
        measured = wait_until(lambda: [p for p in probe.predictions()[mark:] if p["measured"] == 55.0],
                              what="the measured sample")[0]
        assert measured["samples"] == 150
        assert measured["predicted"] == rt.learner.predict(np.array([1234.5, 14.25])).value
        assert d.stop() == 0
    finally:
        d.kill()
        probe.close()


# -- 4. a checkpoint of another network shape ---------------------------------------------------

def test_architecture_mismatch_refuses_to_start_unless_the_config_allows_fresh(broker, tmp_path):
    cfg = write_config(tmp_path, broker)
    probe = Probe(broker)
    d = Daemon(cfg)
    try:
        d.wait_ready()
        _feed(probe, 60, wait_for=5)
        assert d.stop() == 0
    finally:
        d.kill()
        probe.close()
    saved = checkpoint_ids(str(tmp_path / "state"))

    cfg = write_config(tmp_path, broker, models=[model_config(hidden=(8, 4))])
    d = Daemon(cfg)
    assert d.proc.wait(20) == 1
    d.kill()
    text = d.log()
    assert "event=start_failed" in text
    assert "do not fit the configured model" in text and "fresh_on_mismatch: true" in text, text
    assert checkpoint_ids(str(tmp_path / "state")) == saved          # nothing lost

    cfg = write_config(tmp_path, broker, models=[model_config(hidden=(8, 4))],
                       checkpoints={"fresh_on_mismatch": True})
    d = Daemon(cfg)
    try:
        text = d.wait_ready()
        assert "event=checkpoint_mismatch" in text and "model=m1 event=model_fresh" in text, text
        assert control(str(tmp_path / "ctl.sock"), {"cmd": "status"})["models"]["m1"]["samples"] == 0
        assert d.stop() == 0
    finally:
        d.kill()


# -- 5. rollback and pins through the control socket and the CLI -------------------------------

def test_rollback_while_running_predicts_with_the_restored_weights(broker, tmp_path):
    cfg = write_config(tmp_path, broker, metrics={"listen": "127.0.0.1:0"})
    probe = Probe(broker)
    d = Daemon(cfg)
    try:
        d.wait_ready()
        _feed(probe, 120, wait_for=70)
        first = json.loads(cli(cfg, "save-now").stdout)["m1"]
        _feed(probe, 80, seed=1, wait_for=150)
        second = json.loads(cli(cfg, "save-now").stdout)["m1"]
        assert first != second

        out = cli(cfg, "rollback", "--model", "m1", "--to", first)
        assert out.returncode == 0, out.stderr
        assert json.loads(out.stdout) == {"model": "m1", "checkpoint": first}
        assert "not running" not in out.stderr            # it went through the socket
        st = control(str(tmp_path / "ctl.sock"), {"cmd": "status"})["models"]["m1"]
        assert st["checkpoint"] == first and st["samples"] == 120

        x = np.array([1111.0, 12.5])
        rt, _ = offline_runtime(cfg, first)
        later, _ = offline_runtime(cfg, second)
        assert later.learner.predict(x).value != rt.learner.predict(x).value   # the check can fail
        mark = len(probe.predictions())
        _one_reading(probe, 1111.0, 12.5, 50.0)
        msg = wait_until(lambda: probe.predictions()[mark:], what="prediction after rollback")[0]
        assert msg["checkpoint"] == first and msg["samples"] == 120
        assert msg["predicted"] == rt.learner.predict(x).value

        text = d.log()
        assert re.search(rf"model=m1 event=rolled_back to={first} cause=operator", text), text
        samples = scrape(d.metrics_url())
        assert samples[("edgeprop_rollbacks_total", (("cause", "operator"), ("model", "m1")))] == 1

        bad = cli(cfg, "rollback", "--model", "m1", "--to", "20990101T000000Z-000999")
        assert bad.returncode == 1 and "no checkpoint" in bad.stderr and first in bad.stderr

        # listing beside the running daemon reads only: a save's temp file in flight stays
        in_flight = tmp_path / "state" / "m1" / ".20990101T000000Z-000998.npz.tmp"
        in_flight.write_bytes(b"half a checkpoint")
        table = cli(cfg, "checkpoints")
        assert table.returncode == 0 and in_flight.exists(), table.stderr
        in_use = [line.split()[1] for line in table.stdout.splitlines()[1:] if line.split()[-1] == "yes"]
        assert in_use == [first]
        in_flight.unlink()
        assert d.stop() == 0
    finally:
        d.kill()
        probe.close()


def test_operator_commands_act_on_state_dir_when_the_daemon_is_stopped(broker, tmp_path):
    cfg = write_config(tmp_path, broker, checkpoints={"keep": 2})
    probe = Probe(broker)
    d = Daemon(cfg)
    try:
        d.wait_ready()
        _feed(probe, 100, wait_for=50)
        ids = [json.loads(cli(cfg, "save-now").stdout)["m1"]]
        pinned = cli(cfg, "pin", "--model", "m1", "--id", ids[0])
        assert pinned.returncode == 0 and json.loads(pinned.stdout)["pinned"] is True, pinned.stderr
        for k in range(3):                                    # keep: 2 would prune ids[0] ...
            _feed(probe, 10, seed=k + 1, wait_for=60 + 10 * k)
            ids.append(json.loads(cli(cfg, "save-now").stdout)["m1"])
        on_disk = checkpoint_ids(str(tmp_path / "state"))
        assert on_disk == [ids[0], ids[-2], ids[-1]]           # ... but it is pinned
        running = cli(cfg, "status")
        assert running.returncode == 0 and "samples 130" in running.stdout, running.stdout
        assert "learning rate 0.02" in running.stdout and f"checkpoint {ids[-1]}" in running.stdout
        assert d.stop() == 0
    finally:
        d.kill()
        probe.close()
    saved = checkpoint_ids(str(tmp_path / "state"))

    st = cli(cfg, "status")
    assert st.returncode == 0 and "daemon not running" in st.stderr and "acting on" in st.stderr
    table = cli(cfg, "checkpoints")
    assert table.returncode == 0 and "daemon not running" in table.stderr
    lines = table.stdout.splitlines()
    assert lines[0].split() == ["model", "id", "saved", "(UTC)", "samples", "loss", "pinned", "in-use"]
    rows = {line.split()[1]: line.split() for line in lines[1:]}
    assert set(rows) == set(saved)
    assert rows[ids[0]][-2] == "yes" and rows[saved[-1]][-2] == "-"       # pinned column
    assert rows[ids[0]][4] == "100" and rows[saved[-1]][4] == "130"       # samples at save

    out = cli(cfg, "rollback", "--model", "m1", "--to", ids[0])
    assert out.returncode == 0 and "daemon not running" in out.stderr, out.stderr
    promoted = checkpoint_ids(str(tmp_path / "state"))[-1]
    assert promoted not in saved and promoted in out.stdout and ids[0] in out.stdout
    assert cli(cfg, "unpin", "--model", "m1", "--id", ids[0]).returncode == 0
    assert cli(cfg, "save-now").returncode == 1                          # needs the daemon

    d = Daemon(cfg)
    try:
        text = d.wait_ready()
        assert _restored_line(text) == (promoted, 100)                    # the rolled-back state
        assert d.stop() == 0
    finally:
        d.kill()

    if os.geteuid() == 0:
        # root editing the daemon user's directory would leave files the daemon cannot read
        os.chown(tmp_path / "state" / "m1", 65534, 65534)
        refused = cli(cfg, "pin", "--model", "m1", "--id", promoted)
        assert refused.returncode == 1 and "Run this as that user" in refused.stderr, refused.stderr
