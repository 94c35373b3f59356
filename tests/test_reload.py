"""SIGHUP reload on a real daemon subprocess: what applies live, what is refused, what is kept."""
from __future__ import annotations

import os
import re
import signal
import threading
import time

import yaml

from daemon_proc import (Daemon, Probe, bearing_stream, control, scrape, wait_until,
                         write_config)


def _rewrite(cfg: str, change) -> None:
    """Edit the YAML config in place the way an operator would."""
    with open(cfg) as f:
        data = yaml.safe_load(f)
    change(data)
    with open(cfg, "w") as f:
        f.write(yaml.safe_dump(data, sort_keys=False))


def _model_status(d: Daemon) -> dict:
    """Status through the socket; its path comes from the config the daemon started with
    (write_config puts it beside the file), so a broken file on disk does not matter."""
    return control(os.path.join(os.path.dirname(d.config), "ctl.sock"), {"cmd": "status"})["models"]["m1"]


def _reloads(d: Daemon, result: str) -> float:
    return scrape(d.metrics_url())[("edgeprop_config_reloads_total", (("result", result),))]


def _paced(probe: Probe, n: int, seed: int, every_s: float = 0.003) -> threading.Thread:
    """Publish ``n`` readings from a thread, a few ms apart, so a signal lands mid-stream."""
    def run() -> None:
        for topic, payload, _truth in bearing_stream(n, seed=seed):
            probe.client.publish(topic, payload, qos=1)
            time.sleep(every_s / 3)
    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    return thread


def test_sighup_applies_new_learning_rate_and_training_live_without_losing_a_sample(broker, tmp_path):
    cfg = write_config(tmp_path, broker, metrics={"listen": "127.0.0.1:0"})
    probe = Probe(broker)
    d = Daemon(cfg)
    try:
        d.wait_ready()
        probe.publish_many(bearing_stream(100), qos=1)
        probe.wait_for(lambda: len(probe.predictions()) >= 50, what="warm-up and 50 predictions")
        assert _model_status(d)["learning_rate"] == 0.02
        pid = d.proc.pid

        def edit(data: dict) -> None:
            m = data["models"][0]
            m["training"].update(learning_rate=0.005, batch_size=8, steps_per_sample=2,
                                 window=512, warmup_samples=40)
            m["drift"] = {"threshold": 80.0}
            m["interval"] = {"coverage": 0.8}
            m["publish"] = {"qos": 1}
        _rewrite(cfg, edit)

        feeder = _paced(probe, 300, seed=1)
        probe.wait_for(lambda: len(probe.predictions()) >= 80, what="traffic under way")
        d.signal(signal.SIGHUP)
        text = d.wait_log("event=reloaded")
        at_reload = len(probe.predictions())
        feeder.join(20)
        probe.wait_for(lambda: len(probe.predictions()) >= 350, what="all 350 predictions")
        assert at_reload < 350, "the reload should land while readings are still arriving"

        # in force without a restart ...
        st = _model_status(d)
        assert d.proc.pid == pid and d.proc.poll() is None
        assert st["learning_rate"] == 0.005 and st["configured_learning_rate"] == 0.005
        assert st["window"] == 400 and st["samples"] == 400
        assert scrape(d.metrics_url())[("edgeprop_learning_rate", (("model", "m1"),))] == 0.005
        for key in ("training.learning_rate: 0.02 -> 0.005", "training.batch_size: 16 -> 8",
                    "training.steps_per_sample: 1 -> 2", "training.window: 2048 -> 512",
                    "training.warmup_samples: 50 -> 40", "drift.threshold: 50.0 -> 80.0",
                    "interval.coverage: 0.9 -> 0.8", "publish.qos: 0 -> 1"):
            assert f"models[m1].{key}" in text, (key, text)
        assert re.search(r"event=reloaded changes=8 refused=0", text), text
        assert _reloads(d, "applied") == 1 and _reloads(d, "invalid") == 0

        # ... and no sample lost or repeated across it: every count from 50 to 399, once
        counts = [p["samples"] for p in probe.predictions()]
        assert counts == list(range(50, 400))

        # two SGD steps per sample now
        steps = st["steps"]
        probe.publish_many(bearing_stream(10, seed=2), qos=1)
        probe.wait_for(lambda: len(probe.predictions()) >= 360, what="10 more predictions")
        assert _model_status(d)["steps"] - steps == 20
        assert d.stop() == 0
    finally:
        d.kill()
        probe.close()


def test_sighup_with_a_broken_file_keeps_the_running_config_and_the_process(broker, tmp_path):
    cfg = write_config(tmp_path, broker, metrics={"listen": "127.0.0.1:0"})
    probe = Probe(broker)
    d = Daemon(cfg)
    try:
        d.wait_ready()
        pid = d.proc.pid
        _rewrite(cfg, lambda data: data["models"][0]["training"].update(learning_rate=-1.0))
        d.signal(signal.SIGHUP)
        text = d.wait_log("event=reload_refused")
        line = next(x for x in text.splitlines() if "event=reload_refused" in x)
        assert "models[0].training.learning_rate" in line and "-1" in line, line

        with open(cfg, "w") as f:
            f.write("models: [ {name: m1,\n")                 # cut short mid-edit
        d.signal(signal.SIGHUP)
        wait_until(lambda: d.log().count("event=reload_refused") == 2, what="second refusal")

        assert d.proc.poll() is None and d.proc.pid == pid
        assert _model_status(d)["learning_rate"] == 0.02
        assert _reloads(d, "invalid") == 2 and _reloads(d, "applied") == 0
        probe.publish_many(bearing_stream(60), qos=1)     # still learning with the old settings
        probe.wait_for(lambda: len(probe.predictions()) >= 10, what="predictions after refusals")
        assert _model_status(d)["samples"] == 60
        assert d.stop() == 0
    finally:
        d.kill()
        probe.close()


def test_sighup_refuses_a_new_network_shape_but_applies_the_rest(broker, tmp_path):
    cfg = write_config(tmp_path, broker, metrics={"listen": "127.0.0.1:0"})
    d = Daemon(cfg)
    try:
        d.wait_ready()
        architecture = _model_status(d)["architecture"]

        def edit(data: dict) -> None:
            m = data["models"][0]
            m["net"]["hidden"] = [8, 4]
            m["inputs"] = m["inputs"][:1]
            m["training"]["learning_rate"] = 0.001
            data["node"] = "othernode"
        _rewrite(cfg, edit)
        d.signal(signal.SIGHUP)
        text = d.wait_log("event=reloaded")
        refused = [x for x in text.splitlines() if "event=reload_refused_part" in x]
        assert len(refused) == 2, refused
        assert any("node: changed, but takes effect only after a restart" in x for x in refused)
        shape = next(x for x in refused if "models[m1]" in x)
        assert "net.hidden: [16] -> [8, 4]" in shape and "inputs:" in shape, shape
        assert "fresh_on_mismatch" in shape, shape
        # the refused parts are not reported as changed; the learning rate is
        changes = [x for x in text.splitlines() if "event=reload_change" in x]
        assert len(changes) == 1 and "models[m1].training.learning_rate: 0.02 -> 0.001" in changes[0]

        st = _model_status(d)
        assert st["architecture"] == architecture and st["learning_rate"] == 0.001
        assert _reloads(d, "partial") == 1
        assert d.stop() == 0
    finally:
        d.kill()
