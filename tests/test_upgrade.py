"""A box upgraded in the field keeps its model: checkpoints written by an earlier release load.

tests/data/checkpoint-format-N/ holds a checkpoint written by edgeprop when format N was
current (tests/make_checkpoint_fixture.py) and what that model predicted for fixed inputs.
The current code must restore it, predict the same numbers and go on learning. A failure here
means an upgrade would start every deployed model from scratch, or worse, misread it.
"""
from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from test_engine import Plant

DATA = Path(__file__).parent / "data"
# small, so the files stay a few kB in the repository
FIXTURE_MODEL = {"training": {"window": 64}, "align": {"history": 32}}
PROBES = [[900.0, 8.0], [1000.0, 10.0], [1350.0, 17.5]]     # speed, current


def fixture_dir(version: int) -> Path:
    return DATA / f"checkpoint-format-{version}"


FORMATS = sorted(int(p.name.rsplit("-", 1)[1]) for p in DATA.glob("checkpoint-format-*"))


def test_there_is_a_fixture_for_the_current_format() -> None:
    from nets.store import FORMAT_VERSION
    assert FORMAT_VERSION in FORMATS, ("run tests/make_checkpoint_fixture.py for the new format, "
                                       "and keep the older fixtures")


@pytest.mark.parametrize("version", FORMATS)
def test_a_checkpoint_of_an_earlier_release_restores_predicts_alike_and_learns_on(
        tmp_path, version: int) -> None:
    source = fixture_dir(version)
    expected = json.loads((source / "expected.json").read_text())
    shutil.copytree(source / "m1", tmp_path / "state" / "m1")
    plant = Plant(tmp_path, store=True, **FIXTURE_MODEL)
    plant.engine.restore_all()
    rt = plant.rt
    assert rt.checkpoint_id == expected["id"]
    assert rt.learner.samples == expected["samples"]
    assert rt.learner.counters.steps == expected["steps"]
    assert rt.learner.learning_rate == expected["learning_rate"]
    got = [rt.learner.predict(np.array(x, float)).value for x in PROBES]
    # the same arithmetic on the same weights: equal but for the last bits a different
    # BLAS build may order differently
    np.testing.assert_allclose(got, expected["predictions"], rtol=1e-12)
    plant.feed(30)
    assert len(plant.bodies) == 30 and plant.engine.guard_trips == {}
    assert rt.learner.samples == expected["samples"] + 30
