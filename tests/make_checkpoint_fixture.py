"""Write tests/data/checkpoint-format-1/: a checkpoint of today's format and what it predicts.

Run: python tests/make_checkpoint_fixture.py   (by hand, once per checkpoint format; not
collected by pytest). tests/test_upgrade.py loads the files it writes with the current code,
so a change that would make a daemon refuse or misread the checkpoints of a box upgraded in
the field fails there. Rerun this only when the format changes on purpose (a new
``nets.store.FORMAT_VERSION``), into a new directory, and keep the old one: boxes in the
field still hold it.
"""
from __future__ import annotations

import json
import os
import shutil
import sys
import tempfile
from pathlib import Path

HERE = os.path.dirname(os.path.abspath(__file__))
for _p in (os.path.dirname(HERE), HERE):
    if _p not in sys.path:
        sys.path.insert(0, _p)

import numpy as np  # noqa: E402

from nets.store import FORMAT_VERSION  # noqa: E402
from test_upgrade import FIXTURE_MODEL, PROBES, fixture_dir  # noqa: E402
from test_engine import Plant  # noqa: E402


def main() -> int:
    target = fixture_dir(FORMAT_VERSION)
    if target.exists():
        print(f"{target} exists: a format already in the field is never rewritten", file=sys.stderr)
        return 1
    with tempfile.TemporaryDirectory() as tmp:
        plant = Plant(Path(tmp), store=True, **FIXTURE_MODEL)
        plant.feed(150)
        plant.engine.checkpoint_all("fixture")
        rt = plant.rt
        expected = {"id": rt.checkpoint_id, "samples": rt.learner.samples,
                    "steps": rt.learner.counters.steps, "learning_rate": rt.learner.learning_rate,
                    "predictions": [rt.learner.predict(np.array(x, float)).value for x in PROBES]}
        shutil.copytree(Path(tmp) / "state" / "m1", target / "m1")
    (target / "expected.json").write_text(json.dumps(expected, indent=1) + "\n")
    print(f"wrote {target}: {expected}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
