"""The table from kind name to learner class: adding a learner is one line here."""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from typing import Any

from learners.base import Learner
from learners.elimination import Elimination
from learners.errors import ParameterError, StateError, shown
from learners.features import FeatureSpace
from learners.halving import Halving
from learners.passive_aggressive import PassiveAggressive
from learners.perceptron import Perceptron
from learners.weighted_majority import WeightedMajority
from learners.winnow import Winnow

KINDS: dict[str, type[Learner]] = {
    Elimination.kind: Elimination,
    Perceptron.kind: Perceptron,
    PassiveAggressive.kind: PassiveAggressive,
    Winnow.kind: Winnow,
    WeightedMajority.kind: WeightedMajority,
    Halving.kind: Halving,
}


def make(kind: str, **params: Any) -> Learner:
    """Build a learner of ``kind``; ``features`` (a size, names or a space) is required."""
    cls = _lookup(kind)
    if "features" not in params:
        raise ParameterError(
            f"A {kind} learner needs a 'features' parameter (a size or a list of names).",
            field="features",
            rule="required",
            value=None,
        )
    signature = inspect.signature(cls.__init__).parameters
    accepted = set(signature) - {"self"}
    unknown = sorted(set(params) - accepted)
    if unknown:
        raise ParameterError(
            f"The {kind} learner has no parameter {unknown[0]!r}; it takes "
            + ", ".join(sorted(accepted))
            + ".",
            field=unknown[0],
            rule="one of " + ", ".join(sorted(accepted)),
            value=unknown[0],
        )
    missing = [
        name
        for name in sorted(accepted - set(params))
        if signature[name].default is inspect.Parameter.empty
    ]
    if missing:
        raise ParameterError(
            f"A {kind} learner needs a {missing[0]!r} parameter; it has no default.",
            field=missing[0],
            rule="required",
            value=None,
        )
    return cls(**params)


def from_state(state: Mapping[str, Any], space: FeatureSpace | None = None) -> Learner:
    """Rebuild any learner from its :meth:`Learner.to_state` output."""
    if not isinstance(state, Mapping) or "kind" not in state:
        raise StateError(
            f"A learner state must be a mapping with a 'kind'; got {shown(state)}.",
            field="kind",
            rule="present",
            value=None,
        )
    return _lookup(state["kind"]).from_state(state, space)


def describe(kind: str) -> dict[str, Any]:
    """A kind's parameters (name, default) and its documentation, for listings and errors."""
    cls = _lookup(kind)
    params = {
        name: (None if p.default is inspect.Parameter.empty else p.default)
        for name, p in inspect.signature(cls.__init__).parameters.items()
        if name not in ("self", "features")
    }
    return {"kind": kind, "params": params, "doc": inspect.getdoc(inspect.getmodule(cls)) or ""}


def _lookup(kind: Any) -> type[Learner]:
    cls = KINDS.get(kind) if isinstance(kind, str) else None
    if cls is None:
        raise ParameterError(
            f"Unknown learner kind {shown(kind)}; known kinds are "
            + ", ".join(sorted(KINDS))
            + ".",
            field="kind",
            rule="one of " + ", ".join(sorted(KINDS)),
            value=kind if isinstance(kind, str) else shown(kind),
        )
    return cls
