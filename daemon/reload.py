"""Live reload: take what can change without losing learned state, refuse the rest.

A new learning rate, batch size, steps, window, warm-up, drift, interval,
guard and publish settings apply between two messages. A changed network
shape, input list or task would orphan the learned weights, so that model
keeps its old settings and the refusal is reported; the other models and
keys still apply.
"""
from __future__ import annotations

import dataclasses
from typing import TYPE_CHECKING

from .settings import ModelSettings, Settings

if TYPE_CHECKING:
    from .engine import Engine

RESTART_KEYS = ("broker", "state_dir", "metrics", "control", "node")


def shape_of(m: ModelSettings) -> tuple:
    """What the learned state depends on: change any of it and the weights no longer fit."""
    return (m.task, tuple((i.name, i.topic, i.field, i.time_field, i.lags_s) for i in m.inputs),
            (m.target.topic, m.target.field, m.target.time_field),
            m.net, m.training.optimizer)


def apply_to_engine(engine: "Engine", new: Settings) -> list[str]:
    """Apply ``new`` to ``engine``; return human-readable refusals."""
    refusals: list[str] = []
    old = engine.settings
    for key in RESTART_KEYS:
        if getattr(old, key) != getattr(new, key):
            refusals.append(f"{key}: changed, but takes effect only after a restart")
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
        if shape_of(m_old) != shape_of(m_new):
            refusals.append(f"models[{m_old.name}]: network shape, inputs, target or task changed; "
                            f"this model keeps its running settings (restart with a fresh state to change them)")
            kept.append(m_old)
            continue
        _apply_model(engine, m_new)
        kept.append(m_new)
    engine.settings = dataclasses.replace(
        old, models=tuple(kept), checkpoints=new.checkpoints, logging=new.logging)
    return refusals


def _apply_model(engine: "Engine", m: ModelSettings) -> None:
    rt = engine.models[m.name]
    rt.settings = m
    rt.learner.settings = m
    rt.learner.apply_training(m.training)
    rt.drift.apply_settings(m.drift)
    rt.interval.apply_settings(m.interval)
    rt.guard.settings = m.guard
    rt.assembler.apply_settings(m.align) if hasattr(rt.assembler, "apply_settings") else None
    rt.publish_topic = engine.settings.publish_topic(m)
    if engine.metrics is not None:
        engine.metrics.learning_rate_changed(m.name, rt.learner.learning_rate)
        engine.metrics.model(m.name).levels(coverage_target=m.interval.coverage)
