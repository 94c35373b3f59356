"""Live reload: take what can change without losing learned state, refuse the rest.

Learning rate, batch size, steps per sample, window, warm-up and the rest of
``training``, plus ``align``, ``drift``, ``interval``, ``guard`` and ``publish``,
apply between two messages. A changed task, input list, target or network
(``net``, ``training.optimizer``) would orphan the learned weights, so that
model keeps those parts as they run, says exactly which keys were refused, and
still takes its other changes. Keys the process binds at start (broker, state
directory, metrics, control socket, node) wait for a restart.
"""
from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING

from .config import show
from .settings import ModelSettings, Settings

if TYPE_CHECKING:
    from .engine import Engine

RESTART_KEYS = ("broker", "state_dir", "metrics", "control", "node")


def shape_of(m: ModelSettings) -> tuple:
    """What the learned state depends on: change any of it and the weights no longer fit."""
    return (m.task, tuple((i.name, i.topic, i.field, i.time_field, i.lags_s) for i in m.inputs),
            (m.target.topic, m.target.field, m.target.time_field),
            m.net, m.training.optimizer)


def frozen_changes(old: ModelSettings, new: ModelSettings) -> list[str]:
    """Keys of one model that a reload cannot change, as ``key: old -> new`` lines."""
    out = []
    if old.task != new.task:
        out.append(f"task: {show(old.task)} -> {show(new.task)}")
    if old.inputs != new.inputs:
        out.append(f"inputs: {_inputs_text(old)} -> {_inputs_text(new)}")
    if old.target != new.target:
        out.append(f"target: {_source_text(old.target)} -> {_source_text(new.target)}")
    for f in dataclasses.fields(old.net):
        a, b = getattr(old.net, f.name), getattr(new.net, f.name)
        if a != b:
            out.append(f"net.{f.name}: {show(_plain(a))} -> {show(_plain(b))}")
    if old.training.optimizer != new.training.optimizer:
        out.append(f"training.optimizer: {show(old.training.optimizer)} -> "
                   f"{show(new.training.optimizer)}")
    return out


def _plain(v: object) -> object:
    return list(v) if isinstance(v, tuple) else v


def _source_text(s) -> str:
    return s.topic + (f" field {s.field}" if s.field else "") + (f" time {s.time_field}" if s.time_field else "")


def _inputs_text(m: ModelSettings) -> str:
    parts = []
    for i in m.inputs:
        lags = "" if i.lags_s == (0.0,) else " lags " + ",".join(f"{x:g}" for x in i.lags_s)
        parts.append(f"{i.name}={i.topic}" + (f":{i.field}" if i.field else "") + lags)
    return "[" + "; ".join(parts) + "]"


def keep_frozen(old: ModelSettings, new: ModelSettings) -> ModelSettings:
    """``new`` with the parts a running model cannot change taken from ``old``."""
    training = dataclasses.replace(new.training, optimizer=old.training.optimizer)
    return dataclasses.replace(new, task=old.task, inputs=old.inputs, target=old.target,
                               net=old.net, training=training)


def apply_to_engine(engine: "Engine", new: Settings) -> list[str]:
    """Apply ``new`` to ``engine``; return human-readable refusals (the rest is applied)."""
    refusals: list[str] = []
    old = engine.settings
    for key in RESTART_KEYS:
        if getattr(old, key) != getattr(new, key):
            refusals.append(f"{key}: changed, but takes effect only after a restart "
                            f"(systemctl restart edgeprop)")
    old_names = [m.name for m in old.models]
    new_by_name = {m.name: m for m in new.models}
    if set(old_names) != set(new_by_name):
        refusals.append(f"models: the list of model names changed ({sorted(old_names)} -> "
                        f"{sorted(new_by_name)}); adding or removing a model needs a restart")
    kept: list[ModelSettings] = []
    for m_old in old.models:
        m_new = new_by_name.get(m_old.name)
        if m_new is None:
            kept.append(m_old)
            continue
        frozen = frozen_changes(m_old, m_new)
        if frozen:
            refusals.append(
                f"models[{m_old.name}]: {'; '.join(frozen)}: refused, the running model keeps "
                f"its network and inputs (its learned weights would not fit). Its other changes "
                f"are applied. To change these, restart; the saved checkpoints will not fit the "
                f"new network, so set checkpoints.fresh_on_mismatch: true to start it fresh")
            m_new = keep_frozen(m_old, m_new)
        _apply_model(engine, m_old, m_new)
        kept.append(m_new)
    engine.settings = dataclasses.replace(
        old, models=tuple(kept), checkpoints=new.checkpoints, logging=new.logging)
    for rt in engine.models.values():
        if rt.store is not None:
            rt.store.keep = new.checkpoints.keep
    return refusals


def _apply_model(engine: "Engine", old: ModelSettings, m: ModelSettings) -> None:
    rt = engine.models[m.name]
    rt.settings = m
    rt.learner.settings = m
    if m.training != old.training:
        # only then: apply_training resets a guard's learning-rate cut and any drift boost
        rt.learner.apply_training(m.training)
    rt.drift.apply_settings(m.drift)
    rt.interval.apply_settings(m.interval)
    rt.guard.settings = m.guard
    rt.assembler.apply_settings(m.align)
    rt.publish_topic = engine.settings.publish_topic(m)
    if engine.metrics is not None:
        engine.metrics.learning_rate_changed(m.name, rt.learner.learning_rate)
        engine.metrics.model(m.name).levels(coverage_target=m.interval.coverage)
