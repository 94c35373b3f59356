"""Named exception types; each message says what was wrong and what to do."""
from __future__ import annotations


class EdgepropError(Exception):
    """Base of every error edgeprop raises on purpose."""


class ConfigError(EdgepropError):
    """The configuration is invalid; ``problems`` lists every finding at once."""

    def __init__(self, problems: list[str]) -> None:
        self.problems = list(problems)
        super().__init__("invalid configuration:\n  " + "\n  ".join(self.problems))


class PayloadError(EdgepropError):
    """A message payload could not be used; ``reason`` is the metrics label."""

    def __init__(self, reason: str, detail: str) -> None:
        self.reason = reason
        self.detail = detail
        super().__init__(f"{reason}: {detail}")

    def __reduce__(self):
        # crosses from the broker connection's process to the worker (MessageDecoder)
        return (type(self), (self.reason, self.detail))


class SampleSkipped(EdgepropError):
    """A target reading could not form a training sample (e.g. a stale input)."""

    def __init__(self, reason: str, detail: str) -> None:
        self.reason = reason
        super().__init__(f"{reason}: {detail}")


class CheckpointError(EdgepropError):
    """A checkpoint could not be written, found or used."""


class ControlError(EdgepropError):
    """A control-socket request failed; the message is shown to the operator."""
