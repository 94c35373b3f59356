"""Which checkpoint a model starts from, and which ones retention may delete.

Each case is a state on disk that the daemon met in the field or that a config change
makes: a file that reads cleanly but holds NaN or lacks an array, checkpoints of another
optimiser, idle restarts. The engine is driven directly (tests/test_engine.py's Plant),
with the real checkpoint store in a temporary directory.
"""
from __future__ import annotations

import numpy as np
import pytest

from daemon.errors import CheckpointError
from test_engine import Plant


def saved_with(p: Plant, change) -> str:
    """Save the running state after ``change(arrays)``, past the runtime's own checks (as a
    damaged disk or a hand-edited file would give it); returns the id."""
    arrays = p.rt.state_arrays()
    change(arrays)
    return p.rt.store.save(arrays, p.rt.meta("test"))


def trained(tmp_path, n: int = 200, **kw) -> tuple[Plant, str]:
    p = Plant(tmp_path, store=True, warmup=50, **kw)
    p.feed(n)
    p.engine.checkpoint_all("test")
    return p, p.rt.checkpoint_id


def test_a_newest_checkpoint_holding_nan_is_skipped_for_the_older_good_one(tmp_path) -> None:
    p, good = trained(tmp_path)
    p.feed(10)

    def poison(arrays):
        arrays["net/params"][3] = np.nan
    bad = saved_with(p, poison)
    again = Plant(tmp_path, store=True, warmup=50)
    again.engine.restore_all()
    assert again.rt.checkpoint_id == good != bad
    assert again.rt.store.skipped_corrupt == 1
    assert np.isfinite(again.rt.learner.net.params).all()
    again.feed(20)
    assert len(again.bodies) == 20                   # it predicts, no guard trips
    assert again.engine.guard_trips == {}


@pytest.mark.parametrize("damage", ["missing window", "window of another width", "rng zeroed"])
def test_a_newest_checkpoint_whose_arrays_do_not_fit_together_is_skipped(tmp_path, damage) -> None:
    p, good = trained(tmp_path)
    p.feed(10)

    def change(arrays):
        if damage == "missing window":
            del arrays["window/x"]
        elif damage == "window of another width":
            arrays["window/x"] = np.zeros((arrays["window/x"].shape[0], 3))
        else:
            arrays["rng/state"] = np.zeros_like(arrays["rng/state"])
    saved_with(p, change)
    again = Plant(tmp_path, store=True, warmup=50)
    again.engine.restore_all()                       # no exception: it falls back
    assert again.rt.checkpoint_id == good
    assert again.rt.store.skipped_corrupt == 1


def test_another_optimiser_is_a_mismatch_named_in_the_refusal_not_a_crash(tmp_path) -> None:
    trained(tmp_path, training={"optimizer": "sgd"})
    adam = Plant(tmp_path, store=True, warmup=50, training={"optimizer": "adam"})
    with pytest.raises(CheckpointError, match="saved with training.optimizer 'sgd', configured 'adam'.*"
                                              "fresh_on_mismatch"):
        adam.engine.restore_all()


def test_starting_fresh_on_mismatch_keeps_the_old_settings_checkpoints_to_go_back_to(tmp_path) -> None:
    keep = 2
    sgd, _ = trained(tmp_path, keep=keep, training={"optimizer": "sgd"})
    for _ in range(keep):                            # a full set of sgd checkpoints
        sgd.feed(5)
        sgd.engine.checkpoint_all("test")
    sgd_ids = [c.id for c in sgd.rt.store.list()]
    assert len(sgd_ids) == keep
    sgd_samples = sgd.rt.learner.samples

    adam = Plant(tmp_path, store=True, warmup=50, keep=keep, training={"optimizer": "adam"},
                 checkpoints={"fresh_on_mismatch": True})
    adam.engine.restore_all()
    assert adam.rt.checkpoint_id is None and adam.rt.learner.samples == 0
    for _ in range(keep + 3):                        # the fresh model's saves prune
        adam.feed(60)
        adam.engine.checkpoint_all("timer")
    on_disk = [c.id for c in adam.rt.store.list()]
    assert set(sgd_ids) <= set(on_disk)              # none of the other optimiser's deleted
    assert len(set(on_disk) - set(sgd_ids)) == keep  # the running model's own: keep of them

    back = Plant(tmp_path, store=True, warmup=50, keep=keep, training={"optimizer": "sgd"})
    back.engine.restore_all()
    assert back.rt.checkpoint_id == sgd_ids[0]       # newest first in list()
    assert back.rt.learner.samples == sgd_samples


def test_damaged_files_neither_count_towards_keep_nor_get_deleted(tmp_path) -> None:
    keep = 2
    p, first = trained(tmp_path, keep=keep)
    path = p.rt.store.list()[0].path
    with open(path, "r+b") as fh:                    # flip bytes in the middle of the archive
        fh.seek(200)
        fh.write(b"\xff" * 16)
    for _ in range(keep + 2):
        p.feed(5)
        p.engine.checkpoint_all("timer")
    listed = p.rt.store.list()
    assert [c.valid for c in listed].count(True) == keep
    assert [c.id for c in listed if not c.valid] == [first]


def test_an_idle_restart_writes_no_copy_but_a_rollback_is_saved_as_the_newest(tmp_path) -> None:
    p, older = trained(tmp_path)
    p.feed(30)
    p.engine.checkpoint_all("test")
    newest = p.rt.checkpoint_id
    again = Plant(tmp_path, store=True, warmup=50)
    again.engine.restore_all()
    again.engine.checkpoint_changed("shutdown")      # nothing learned since the load
    assert [c.id for c in again.rt.store.list()] == [newest, older]

    again.engine.rollback("m1", older)               # operator: back to the older state
    again.engine.checkpoint_changed("shutdown")      # it must be what the next start loads
    latest = again.rt.store.list()[0]
    assert latest.id not in (newest, older) and latest.samples == 200

    fresh = Plant(tmp_path / "other", store=True, warmup=50)
    fresh.engine.restore_all()
    fresh.engine.checkpoint_changed("shutdown")      # a model that saw nothing saves nothing
    assert fresh.rt.store.list() == []


def test_a_failed_save_keeps_its_reason_for_the_operator_and_loses_nothing(tmp_path) -> None:
    p, good = trained(tmp_path)
    p.feed(10)
    directory = p.rt.store.directory
    p.rt.store.directory = str(tmp_path / "gone" / "m1")     # as if the disk went away
    assert p.engine.checkpoint_model(p.rt, "operator") is None
    assert "No such file" in p.rt.last_save_error and "gone/m1" in p.rt.last_save_error
    p.rt.store.directory = directory
    assert [c.id for c in p.rt.store.list()] == [good]


def test_files_from_before_headers_named_the_optimiser_are_told_by_their_arrays(tmp_path) -> None:
    sgd = Plant(tmp_path, store=True, warmup=50, training={"optimizer": "sgd"})
    sgd.feed(100)
    meta = {k: v for k, v in sgd.rt.meta("test").items() if k != "optimizer"}
    old = sgd.rt.store.save(sgd.rt.state_arrays(), meta)       # as an older build wrote it
    adam = Plant(tmp_path, store=True, warmup=50, training={"optimizer": "adam"})
    with pytest.raises(CheckpointError, match="saved with training.optimizer 'sgd'"):
        adam.engine.restore_all()
    # and an operator's copy of it as the newest (offline rollback) is refused the same way
    with pytest.raises(CheckpointError, match=f"checkpoint {old} was saved for other settings"):
        adam.rt.store.promote(old)
    assert [c.id for c in adam.rt.store.list()] == [old]


def test_offline_rollback_to_another_optimisers_checkpoint_is_refused_by_the_cli(tmp_path) -> None:
    import os
    import subprocess
    import sys

    import yaml
    from daemon_proc import ROOT, model_config
    sgd, cid = trained(tmp_path, training={"optimizer": "sgd"})
    config = tmp_path / "edgeprop.yaml"
    config.write_text(yaml.safe_dump({
        "node": "station-7", "state_dir": str(tmp_path / "state"), "metrics": {"listen": None},
        "control": {"socket": str(tmp_path / "ctl.sock")},
        "models": [model_config(training={"optimizer": "adam"})]}))
    res = subprocess.run([sys.executable, "-m", "daemon.cli", "rollback", "--model", "m1", "--to", cid,
                          "-c", str(config)], capture_output=True, text=True, timeout=60,
                         env={**os.environ, "PYTHONPATH": ROOT})
    assert res.returncode == 1, (res.stdout, res.stderr)
    assert f"checkpoint {cid} was saved for other settings (saved with training.optimizer 'sgd', " \
           f"configured 'adam')" in res.stderr
    assert "Traceback" not in res.stderr
    assert [c.id for c in sgd.rt.store.list()] == [cid]


def test_inputs_reordered_or_relagged_are_a_mismatch_not_a_silent_rewiring(tmp_path) -> None:
    """Two inputs swapped in the config keep the network's shape, so the shape check alone
    would load every weight and scaler onto the other column: predictions wrong until
    relearned, with nothing said. The saved inputs are compared too."""
    from daemon_proc import model_config
    trained(tmp_path)
    speed, current = model_config()["inputs"]
    swapped = Plant(tmp_path, store=True, warmup=50, inputs=[current, speed])
    with pytest.raises(CheckpointError, match=r"saved with inputs \[speed\(0\), current\(0\)\], "
                                              r"configured \[current\(0\), speed\(0\)\]"):
        swapped.engine.restore_all()
    lagged = Plant(tmp_path, store=True, warmup=50, inputs=[speed, {**current, "lags_s": [30]}])
    with pytest.raises(CheckpointError, match=r"configured \[speed\(0\), current\(30\)\]"):
        lagged.engine.restore_all()
    same = Plant(tmp_path, store=True, warmup=50)
    same.engine.restore_all()
    assert same.rt.learner.samples == 200


def test_a_checkpoint_saved_under_another_model_name_loads_with_a_warning(tmp_path) -> None:
    p, _ = trained(tmp_path)
    meta = {**p.rt.meta("test"), "model": "seal_leak"}      # a directory copied by hand
    other = p.rt.store.save(p.rt.state_arrays(), meta)
    again = Plant(tmp_path, store=True, warmup=50)
    seen = []
    again.rt.store.log = lambda level, event, **fields: seen.append((level, event, fields))
    again.engine.restore_all()
    assert again.rt.checkpoint_id == other
    assert [(lv, ev, f["saved_by"]) for lv, ev, f in seen if ev == "checkpoint_of_other_model"] == \
        [("warning", "checkpoint_of_other_model", "seal_leak")]
