"""Everything one model carries at run time, and how it is saved and restored.

A ``ModelRuntime`` bundles the learner with its input histories, drift monitor,
interval, guard and checkpoint store, so a checkpoint is one consistent cut of
all of them. The last checkpoint taken is also kept in memory as the "last
good" state the guard falls back to (replay has no disk, but the same guard).
"""
from __future__ import annotations

import time
from typing import Callable

import numpy as np

from nets import StateFileError
from nets.bundle import split_parts

from .align import FeatureAssembler
from .checkpoints import CheckpointStore
from .drift import DriftMonitor
from .errors import CheckpointError
from .guard import DivergenceGuard
from .intervals import ConformalInterval
from .learner import Diverged, ModelLearner
from .settings import ModelSettings

TIME_RING = 4096    # scored samples whose processing time is remembered (>= drift.CHANGE_SEARCH)


class ModelRuntime:
    """One configured model with all of its state; owned by the worker thread only."""

    def __init__(self, settings: ModelSettings, publish_topic: str,
                 store: CheckpointStore | None) -> None:
        self.settings = settings
        self.name = settings.name
        self.publish_topic = publish_topic
        self.store = store
        self.learner = ModelLearner(settings)
        self.assembler = FeatureAssembler(settings)
        self.drift = DriftMonitor(settings.drift, [i.name for i in settings.inputs])
        self.interval = ConformalInterval(settings.interval)
        self.guard = DivergenceGuard(settings.guard)
        self.checkpoint_id: str | None = None
        self.good_id: str | None = None      # the checkpoint ``good`` was saved as, if any
        self.good: dict[str, np.ndarray] | None = None     # last checkpoint's arrays
        # learner.samples when the state last equalled the newest checkpoint on disk (saved,
        # or loaded as the newest at start); None after a rollback or restore of another state
        self.saved_samples: int | None = None
        self.last_tick: float | None = None
        self.lag0 = self._lag0_columns(settings)
        self.lag0_cols: list[int] = self.lag0.tolist()     # the same, for plain-list indexing
        self.last_loss = float("nan")
        # target readings that formed no sample, by reason, since start: `status` shows them,
        # so "samples 0" after minutes of traffic comes with its why (stale inputs, lags)
        self.skipped: dict[str, int] = {}
        self.last_save_error = ""            # why the last failed save failed (for save-now)
        self.seen_at = np.zeros(TIME_RING)   # worker clock when each recent scored sample was handled
        self.seen_n = 0

    def __repr__(self) -> str:
        return f"ModelRuntime({self.name!r}, samples={self.learner.samples}, checkpoint={self.checkpoint_id})"

    @staticmethod
    def _lag0_columns(settings: ModelSettings) -> np.ndarray:
        """Column of each input's first listed lag: the value the input-shift detector watches."""
        cols, at = [], 0
        for inp in settings.inputs:
            cols.append(at)
            at += len(inp.lags_s)
        return np.asarray(cols, np.int64)

    # -- when samples were handled -------------------------------------------
    def note_sample_time(self, now: float) -> None:
        """Remember when the worker handled a scored sample (the drift detector counts these)."""
        self.seen_at[self.seen_n % TIME_RING] = now
        self.seen_n += 1

    def time_of(self, samples_back: int) -> float | None:
        """Worker time of the sample ``samples_back`` scored samples ago (1 = the newest).

        None when it is not remembered: older than the ring, or from before a restore of
        a checkpoint saved without them (by an older edgeprop).
        On the checkpoint store's clock, so ``store.id_before(time_of(k))`` is the newest
        checkpoint holding none of the newest ``k`` samples.
        """
        if samples_back < 1 or samples_back > min(self.seen_n, TIME_RING):
            return None
        return float(self.seen_at[(self.seen_n - samples_back) % TIME_RING])

    def _forget_sample_times(self) -> None:
        self.seen_n = 0

    def sample_times(self) -> np.ndarray:
        """The remembered sample times, oldest first (saved with the model: the restored
        drift detectors count samples from before the restart, and a restore on drift must
        find when the oldest of them was handled)."""
        n = min(self.seen_n, TIME_RING)
        return np.roll(self.seen_at, -(self.seen_n % TIME_RING))[TIME_RING - n:] if n else np.zeros(0)

    def load_sample_times(self, times: np.ndarray) -> None:
        times = np.asarray(times, np.float64).reshape(-1)[-TIME_RING:]
        self.seen_at[:len(times)] = times
        self.seen_n = len(times)

    # -- state --------------------------------------------------------------
    def state_arrays(self) -> dict[str, np.ndarray]:
        arrays = self.learner.state_arrays()
        for part, obj in (("align", self.assembler), ("drift", self.drift),
                          ("interval", self.interval), ("guard", self.guard)):
            for key, arr in obj.state().items():
                arrays[f"{part}/{key}"] = np.asarray(arr)
        arrays["times/handled"] = self.sample_times()
        return arrays

    def load_arrays(self, arrays: dict[str, np.ndarray]) -> None:
        """Restore every part; raises StateFileError when the arrays do not fit together or
        hold a non-finite number (such a state would fail on its first prediction, and as
        the guard's fallback it would be restored again and again)."""
        bad = _non_finite(arrays)
        if bad:
            raise StateFileError("non_finite", f"non-finite numbers in {', '.join(bad[:3])}")
        fresh = ModelLearner(self.settings)
        try:
            rest = fresh.load_arrays(dict(arrays))
            parts = {"align": FeatureAssembler(self.settings),
                     "drift": DriftMonitor(self.settings.drift, [i.name for i in self.settings.inputs]),
                     "interval": ConformalInterval(self.settings.interval),
                     "guard": DivergenceGuard(self.settings.guard)}
            for name, obj in parts.items():
                if name in rest:
                    obj.load_state(rest[name])
        except KeyError as exc:
            raise StateFileError("content", f"the array {exc} is missing") from None
        except (ValueError, TypeError, SyntaxError, CheckpointError) as exc:
            raise StateFileError("content", f"checkpoint does not fit model {self.name!r}: {exc}") from None
        self.learner = fresh
        self.assembler, self.drift = parts["align"], parts["drift"]
        self.interval, self.guard = parts["interval"], parts["guard"]
        self.good = dict(arrays)
        self.saved_samples = self.learner.samples
        # the restored detectors count from the checkpoint, and so do its sample times
        # (a checkpoint from before they were saved has none)
        self.load_sample_times(rest.get("times", {}).get("handled", np.zeros(0)))

    def meta(self, reason: str) -> dict:
        return {"model": self.name, "samples": self.learner.samples,
                "loss": self.guard.long if self.guard.seen else None,
                "learning_rate": self.learner.learning_rate, "reason": reason,
                "optimizer": self.settings.training.optimizer, "inputs": self._input_columns(),
                **self.learner.header()}

    def _input_columns(self) -> list[list]:
        """Each input's name and lags, in column order: what the saved weights are wired to."""
        return [[i.name, [float(lag) for lag in i.lags_s]] for i in self.settings.inputs]

    def checkpoint(self, reason: str) -> str | None:
        """Save now; returns the new id (None without a store). Raises CheckpointError."""
        if not self.learner.weights_finite():
            raise CheckpointError(f"model {self.name!r} has non-finite weights; not saved")
        arrays = self.state_arrays()
        bad = _non_finite(arrays)
        if bad:
            # e.g. a scaler overflowed on a wild reading during warm-up: as the guard's
            # "last good" state it would fail on its first prediction, again and again
            raise CheckpointError(f"model {self.name!r} holds non-finite numbers in "
                                  f"{', '.join(bad[:3])}; not saved")
        fallback = self.guard.calm
        if fallback:
            # kept in memory before the save, so a full disk does not take the fallback away
            self.good, self.good_id = arrays, None
        self.saved_samples = self.learner.samples
        if self.store is None:
            return None
        self.checkpoint_id = self.store.save(arrays, self.meta(reason))
        if fallback:
            self.good_id = self.checkpoint_id
        return self.checkpoint_id

    def unsaved_changes(self) -> bool:
        """True when the state differs from the newest checkpoint: it learned since the last
        save, or another state was restored. A model that has seen nothing has nothing to keep;
        saving it anyway (each idle restart) would push real rollback points out of ``keep``."""
        if self.learner.samples == 0:
            return False
        return self.saved_samples != self.learner.samples

    def restore_newest(self) -> str | None:
        """Load the newest checkpoint that fits; None when there is none."""
        if self.store is None:
            return None
        self.store.fits = self.refusal
        found = self.store.load_newest(self._load_if_fits)
        if found is None:
            return None
        self._note_other_name(found[0], found[2])
        self.checkpoint_id = self.good_id = found[0]
        return found[0]

    def _note_other_name(self, cid: str, meta: dict) -> None:
        """Say so when the checkpoint was saved under another model name: a directory copied
        or renamed by hand loads (the settings fit), but it may hold another target's model."""
        saved = meta.get("model")
        if saved is not None and saved != self.name and self.store is not None:
            self.store.log("warning", "checkpoint_of_other_model", model=self.name, id=cid,
                           saved_by=saved, action="loaded: the network, optimiser and inputs fit")

    def refusal(self, meta: dict) -> str | None:
        """Why a checkpoint was saved for another model shape (None: it fits).

        The network's shape and the optimiser (its state has other arrays) come from the
        config: a checkpoint refused here is not damaged, it belongs to other settings.
        """
        try:
            self.learner.check_header(meta)
        except StateFileError as exc:
            return str(exc)
        saved = meta.get("optimizer")        # the store fills it in for older files
        configured = self.settings.training.optimizer
        if saved is not None and saved != configured:
            return f"saved with training.optimizer {saved!r}, configured {configured!r}"
        # Same shape, other wiring: inputs renamed, reordered or lagged otherwise would feed
        # each weight and scaler another column. Files from before headers named them pass.
        saved_inputs, inputs = meta.get("inputs"), self._input_columns()
        if saved_inputs is not None and saved_inputs != inputs:
            return f"saved with inputs {_inputs_text(saved_inputs)}, configured {_inputs_text(inputs)}"
        return None

    def _load_if_fits(self, meta: dict, arrays: dict[str, np.ndarray]) -> str | None:
        """Load the checkpoint unless it belongs to other settings; raises StateFileError
        when its contents are unusable (non-finite numbers, arrays that do not fit together)."""
        refusal = self.refusal(meta)
        if refusal is None:
            self.load_arrays(arrays)
        return refusal

    def restore(self, cid: str) -> None:
        """Load a named checkpoint (rollback)."""
        if self.store is None:
            raise CheckpointError("no checkpoint store in this mode")
        arrays, meta = self.store.load(cid)
        try:
            refusal = self._load_if_fits(meta, arrays)
        except StateFileError as exc:
            refusal = str(exc)
        if refusal is not None:
            raise CheckpointError(f"checkpoint {cid} cannot be restored into model {self.name!r}: "
                                  f"{refusal}")
        self._note_other_name(cid, meta)
        self.checkpoint_id = self.good_id = cid
        self.saved_samples = None          # not the newest on disk: the next save keeps it

    def restore_good(self) -> str:
        """Fall back to the last good state (guard); a fresh model if there never was one."""
        if self.good is not None:
            inputs = self.assembler          # readings are facts about the plant, not the model
            self.load_arrays(self.good)
            self.assembler = inputs
            if self.good_id is not None:
                self.checkpoint_id = self.good_id    # the published messages name what runs
            self.saved_samples = None
            return self.good_id or "memory"
        self.learner = ModelLearner(self.settings)
        self.saved_samples = None
        self.guard = DivergenceGuard(self.settings.guard)    # a new model has no normal level yet
        self._forget_sample_times()
        return "fresh"

    def good_state_fits(self, bar: float, n: int) -> bool:
        """True when the last good state's mean loss on the newest ``n`` samples is under ``bar``.

        Tells a diverging model (the good state still fits the data: restore it) from a
        changed plant (the good state is as wrong as the running one: restoring would only
        throw learning away). Losses are in the good state's own standardised units, close
        to the running model's as the scalers move slowly.
        """
        if self.good is None:
            return False
        probe = ModelLearner(self.settings)
        probe.load_arrays(dict(self.good))
        x, y = self.learner.window.newest(n)
        losses = []
        for xi, yi in zip(x, y[:, 0]):
            try:
                losses.append(probe.sample_loss(probe.predict(xi), float(yi)))
            except Diverged:
                return False
        return bool(losses) and float(np.mean(losses)) <= bar

    def status(self) -> dict:
        lr = self.learner
        return {"samples": lr.samples, "steps": lr.counters.steps, "warmed_up": lr.warmed_up,
                "recent_loss": self.guard.short if self.guard.seen else None,
                "long_loss": self.guard.long if self.guard.seen else None,
                "learning_rate": lr.learning_rate, "configured_learning_rate": lr.training.learning_rate,
                "checkpoint": self.checkpoint_id, "drift_active": bool(self.drift.active),
                "interval_coverage": self.interval.coverage, "architecture": lr.net.architecture,
                "window": len(lr.window), "warmup_samples": lr.training.warmup_samples,
                "skipped": dict(self.skipped)}


def store_for(state_dir: str, model: ModelSettings, keep: int, log: Callable[..., None],
              clock: Callable[[], float] = time.time) -> CheckpointStore:
    """The checkpoint store of one model: ``<state_dir>/<model>/``."""
    import os
    return CheckpointStore(os.path.join(state_dir, model.name), keep, clock=clock, log=log)


def _inputs_text(columns: object) -> str:
    """Inputs as name(lags) for a message, e.g. [speed(0, 30), current(0)]."""
    try:
        return "[" + ", ".join(f"{name}({', '.join(f'{lag:g}' for lag in lags)})"
                               for name, lags in columns) + "]"
    except (TypeError, ValueError):
        return repr(columns)          # a hand-edited header: show it as it is


def _non_finite(arrays: dict[str, np.ndarray]) -> list[str]:
    """Names of the float arrays holding NaN or infinity, sorted."""
    return sorted(k for k, a in arrays.items() if a.dtype.kind == "f" and not np.isfinite(a).all())


__all__ = ["ModelRuntime", "store_for", "split_parts"]
