"""Pieces shared by the rule-based and multiplicative learners (halving, weighted majority, Winnow).

Literals and rules
    A literal is a flag's name (true when the flag's value is non-zero) or ``!name`` (true when
    it is zero). ``true`` and ``false`` are the constant rules and cannot be feature names in a
    rule. A name may not itself start with ``!``. :func:`parse_literal` turns the text into
    ``(name, positive)`` and names the rule and the rule broken when the text is not a literal.

Slots
    A learner over explicit rules computes over the names its rules mention, not over the whole
    space. :class:`SlotMap` maps the space's indices to those names' slots, resolving lazily as an
    open space admits names, so a rule may name a flag the stream has not sent yet (it reads as 0).

Scaled weights
    :class:`ScaledWeights` holds one non-negative weight per slot of a space that may be huge
    (``count`` = 10^8) while only the slots actually seen are stored: every slot never stored has
    the same weight, and one scale factor multiplies them all. Multiplying the weights of a few
    slots by one factor and *every other slot* by another costs O(few): the scale takes the
    second factor, and the few stored slots are divided by it. Winnow on complemented inputs
    (every unseen flag is on) and weighted majority over all ``2n + 2`` literal rules (every rule on
    an unseen flag errs together) both need exactly that. The sum of all weights is kept up to
    date in O(few) too. Because a running sum can lose its precision once it shrinks far below
    its largest value (cancellation), it is recomputed exactly (``math.fsum`` over the stored
    slots) whenever it falls 2^8 below its peak; the scale is kept within 2^-400 .. 2^400 by folding
    its power of two into the stored slots (an exact operation). Weights that fall below the
    smallest float flush to 0; the learners' docstrings say why that cannot break their ceilings.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from learners.base import ensure_length
from learners.errors import ParameterError, StateError, shown
from learners.features import FeatureSpace

NEGATION = "!"
CONSTANTS = ("true", "false")

_FOLD_EXPONENT = 400  # keep the scale within 2^-400 .. 2^400
_RECOMPUTE_BELOW = 2.0**-8  # recompute the running sum when it falls this far below its peak


def parse_literal(text: Any, *, kind: str, field: str) -> tuple[str, bool]:
    """``"name"`` -> ``(name, True)``, ``"!name"`` -> ``(name, False)``; else a ParameterError."""
    rule = "a flag name or !name (not true/false, no double !)"
    if isinstance(text, str) and text:
        positive = not text.startswith(NEGATION)
        name = text if positive else text[len(NEGATION) :]
        if name and not name.startswith(NEGATION) and name not in CONSTANTS:
            return name, positive
    raise ParameterError(
        f"{field} of {kind} must be {rule}; got {shown(text)}.",
        field=field,
        rule=rule,
        value=text if isinstance(text, str | int | float) else shown(text),
    )


def literal_text(name: str, positive: bool) -> str:
    """The text form of a literal: ``name`` or ``!name``."""
    return name if positive else NEGATION + name


def check_names_known(
    space: FeatureSpace, names: Sequence[str], fields: Sequence[str], kind: str
) -> None:
    """In a closed space, every named flag must be declared; name the first rule that is not."""
    if not space.closed:
        return
    for name, field in zip(names, fields, strict=True):
        if name not in space.index:
            raise ParameterError(
                f"{field} of {kind} names flag {name!r}, which is not in the stream's closed "
                "feature space.",
                field=field,
                rule="names declared in the stream's feature list",
                value=name,
            )


class SlotMap:
    """Maps a space's feature indices to slots 0..m-1 of the ``m`` names a set of rules mentions."""

    __slots__ = ("space", "slot", "at", "known")

    def __init__(self, space: FeatureSpace, names: Sequence[str]) -> None:
        self.space = space
        self.slot = {name: i for i, name in enumerate(names)}
        self.at = np.full(0, -1, dtype=np.int64)  # space index -> slot, or -1
        self.known = 0  # space indices resolved so far

    def slots(self, idx: np.ndarray) -> np.ndarray:
        """The slots of the given space indices that some rule mentions (others are dropped)."""
        size = len(self.space)
        if size > self.known:
            self.at = ensure_length(self.at, size, -1)
            names, slot = self.space.names, self.slot
            for j in range(self.known, size):
                self.at[j] = slot.get(names[j], -1)
            self.known = size
        found = self.at[idx]
        return found[found >= 0]


class ScaledWeights:
    """``count`` non-negative weights ``w_i = scale * rel[i]``; unstored slots have ``rel = base``.

    Stored slots are a prefix ``rel[:len(rel)]`` grown on demand by :meth:`grow`; ``total`` is the
    sum of ``rel`` over all ``count`` slots (stored or not). After a :meth:`mul` whose "every other
    slot" factor is 0, the base is 0 and ``support`` lists the only slots that may be non-zero.
    """

    __slots__ = ("count", "scale", "base", "rel", "total", "peak", "support")

    def __init__(self, count: int, start: float, stored: np.ndarray | None = None) -> None:
        self.count = count
        self.scale = 1.0
        self.base = float(start)
        self.rel = np.full(0, self.base) if stored is None else stored.astype(np.float64)
        self.total = self._exact_total()
        self.peak = self.total
        self.support: set[int] | None = None

    def grow(self, length: int) -> None:
        """Store at least the slots below ``length`` (new ones at the base weight)."""
        if len(self.rel) < length:
            self.rel = ensure_length(self.rel, length, self.base)
        if length >= self.count and self.base != 0.0:
            # Every slot is stored: the base stands for no slot any more. Pin it to 0 so that
            # folding the scale into it can never overflow.
            self.rel[self.count :] = 0.0
            self.base = 0.0

    def dot(self, idx: np.ndarray, val: np.ndarray | None, complement: bool = False) -> float:
        """``sum w_i x_i`` over the given slots (``val`` None: all values 1), or with ``complement``
        ``sum w_i (1 - x_i)`` over *all* slots, where a slot not in ``idx`` has ``x_i = 0``."""
        part = self.rel[idx]
        s = float(part.sum()) if val is None else float(part @ val)
        if complement:
            s = self.total - s
        return self.scale * s

    def sum_at(self, idx: np.ndarray) -> float:
        """The sum of the weights of the given (distinct) slots."""
        return self.scale * float(self.rel[idx].sum())

    def weight(self) -> float:
        """The sum of all ``count`` weights."""
        return self.scale * self.total

    def value(self, i: int) -> float:
        """One slot's weight."""
        return self.scale * (float(self.rel[i]) if i < len(self.rel) else self.base)

    def mul(self, idx: np.ndarray, active: float | np.ndarray, rest: float) -> None:
        """Multiply the weights of the (distinct, stored) slots ``idx`` by ``active`` and the weight
        of every other slot by ``rest``, in O(len(idx)) (O(support) when ``rest`` is 0)."""
        if rest == 0.0:
            self._keep_only(idx, active)
            return
        rel = self.rel
        old = rel[idx]
        new = old * active if rest == 1.0 else old * (active / rest)
        if rest != 1.0:
            self.scale *= rest
        rel[idx] = new
        self.total += float((new - old).sum())
        self._tidy()

    def rescale(self, exponent: int) -> None:
        """Multiply every weight by ``2**exponent`` (exact)."""
        self.scale = math.ldexp(self.scale, exponent)
        self._tidy()

    def _keep_only(self, idx: np.ndarray, active: float | np.ndarray) -> None:
        kept = np.asarray(self.scale * self.rel[idx] * active, dtype=np.float64)
        if self.support is None:
            self.rel[:] = 0.0
        elif self.support:
            self.rel[np.fromiter(self.support, dtype=np.int64, count=len(self.support))] = 0.0
        self.rel[idx] = kept
        self.base, self.scale = 0.0, 1.0
        self.support = set(idx[kept != 0.0].tolist())
        self.total = self.peak = math.fsum(kept.tolist())

    def _tidy(self) -> None:
        if self.total > self.peak:
            self.peak = self.total
        elif self.total < self.peak * _RECOMPUTE_BELOW:
            self.total = self.peak = self._exact_total()
        exponent = math.frexp(self.scale)[1]
        if abs(exponent) > _FOLD_EXPONENT:
            self.rel = np.ldexp(self.rel, exponent)
            self.base = math.ldexp(self.base, exponent)
            self.total = math.ldexp(self.total, exponent)
            self.peak = math.ldexp(self.peak, exponent)
            self.scale = math.ldexp(self.scale, -exponent)

    def _exact_total(self) -> float:
        """The sum over all slots, correctly rounded and independent of how far ``rel`` has grown
        (slots past the stored ones, and stored ones still at the base, add exactly the base)."""
        stored = self.rel[: min(len(self.rel), self.count)]
        differ = stored[stored != self.base]
        return math.fsum([self.count * self.base, *(differ - self.base).tolist()])

    def to_state(self) -> dict[str, Any]:
        """Plain data: the scalars and the stored slots that differ from the base."""
        stored = self.rel[: min(len(self.rel), self.count)]
        index = np.flatnonzero(stored != self.base)
        return {
            "scale": self.scale,
            "base": self.base,
            "total": self.total,
            "peak": self.peak,
            "index": index.tolist(),
            "value": stored[index].tolist(),
            "support": None if self.support is None else sorted(self.support),
        }

    def restore(self, data: Mapping[str, Any], length: int, where: str) -> None:
        """Set this vector from :meth:`to_state` output; ``length`` slots are stored at least."""
        try:
            index = np.asarray(data["index"], dtype=np.int64)
            value = np.asarray(data["value"], dtype=np.float64)
            base = float(data["base"])
            ok = index.shape == value.shape and index.ndim == 1
            ok = ok and (len(index) == 0 or (index.min() >= 0 and index.max() < self.count))
            ok = ok and bool(np.all(np.isfinite(value)) and value.min(initial=0.0) >= 0.0)
            if not ok:
                raise ValueError("index and value do not match the space")
            rel = np.full(max(length, int(index.max(initial=-1)) + 1), base)
            rel[index] = value
            support = data["support"]
            self.rel, self.base = rel, base
            self.scale = float(data["scale"])
            self.total = float(data["total"])
            self.peak = float(data["peak"])
            self.support = None if support is None else {int(i) for i in support}
            self.grow(length)
        except (KeyError, TypeError, ValueError) as exc:
            raise StateError(
                f"The stored weights {where} cannot be restored: {exc}.",
                field=where,
                rule="weights written by to_state",
                value=None,
            ) from exc


__all__ = [
    "CONSTANTS",
    "NEGATION",
    "ScaledWeights",
    "SlotMap",
    "check_names_known",
    "literal_text",
    "parse_literal",
]
