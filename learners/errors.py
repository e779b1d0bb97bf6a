"""The errors a learner raises on bad parameters, items, labels or states.

Every message names the thing, the rule it broke and the value received, so a caller can pass it
on to a person unchanged. The tree::

    LearnerError (ValueError)
     +-- ParameterError   a constructor parameter is out of its domain
     +-- FeatureError     an item is malformed, names an unknown feature, or fills the space
     +-- LabelError       a label is not 0, 1, True or False
     +-- StateError       a stored state cannot be restored

Each carries ``field`` (what was wrong), ``rule`` (what it must be) and ``value`` (what came), so a
service can build a structured error without parsing the message.
"""

from __future__ import annotations

from typing import Any


class LearnerError(ValueError):
    """Base of the learners' domain errors."""

    def __init__(self, message: str, *, field: str, rule: str, value: Any = None) -> None:
        super().__init__(message)
        self.field = field
        self.rule = rule
        self.value = value


class ParameterError(LearnerError):
    """A constructor parameter is outside its domain."""


class FeatureError(LearnerError):
    """An item is malformed, names a feature outside a closed space, or overfills an open one."""


class LabelError(LearnerError):
    """A label is not one of 0, 1, True, False."""


class StateError(LearnerError):
    """A stored state is not one this version can restore."""


def shown(value: Any, limit: int = 80) -> str:
    """A short printable form of a received value for an error message."""
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."
