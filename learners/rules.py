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

Spreads
    :class:`Spread` keeps the lowest and highest value of a multiset of integers in which every
    member starts at 0 and moves by one step at a time, with an unbounded supply of members that
    stay at 0 (weighted majority's flags never seen on). It holds how many members sit at each
    value (a histogram) and the count at each extreme; the extremes move by at most one step per
    move, so a move of ``k`` members costs O(k). The counts at the extremes follow from the moved
    values alone; the histogram is read only when an extreme's last member moves inwards, and is
    brought up to date then, a batch of moves at a time (amortised O(k) per move). It is a numpy
    window over the values between the extremes, grown by doubling up to ``2^16`` values and
    (when the owner's values are known) at most twice as many values as members; past that, the
    values outside the window are counted in a dict, so memory follows the members, not how far
    they have moved. An owner with up to ``SPREAD_SCAN`` members skips the histogram: a count is
    then one numpy scan of the owner's values, cheaper than keeping a histogram at that size.
"""

from __future__ import annotations

import math
from collections import Counter
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
SPREAD_WINDOW = 2**16  # the widest numpy histogram a Spread keeps (256 KiB of int32)
SPREAD_SCAN = 16384  # a Spread with up to this many live values counts by scanning them
SPREAD_PENDING = 32  # moves a Spread holds back before it applies them to its histogram
_sum = np.add.reduce  # what ndarray.sum calls, without its Python wrapper: the same sum
_ONE = np.int32(1)  # the histogram's own type: ufunc.at is slow when it must cast


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
        found = self.lookup(idx)
        return found[found >= 0]

    def lookup(self, idx: np.ndarray) -> np.ndarray:
        """The slot of each given space index, -1 where no rule mentions it."""
        size = len(self.space)
        if size > self.known:
            self.at = ensure_length(self.at, size, -1)
            names, slot = self.space.names, self.slot
            for j in range(self.known, size):
                self.at[j] = slot.get(names[j], -1)
            self.known = size
        return self.at[idx]


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
        return self.dot_part(self.rel[idx], val, complement)

    def dot_part(self, part: np.ndarray, val: np.ndarray | None, complement: bool = False) -> float:
        """:meth:`dot` from ``part = rel[idx]`` already gathered."""
        s = float(_sum(part)) if val is None else float(part @ val)
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

    def mul(
        self,
        idx: np.ndarray,
        active: float | np.ndarray,
        rest: float,
        old: np.ndarray | None = None,
    ) -> None:
        """Multiply the weights of the (distinct, stored) slots ``idx`` by ``active`` and the weight
        of every other slot by ``rest``, in O(len(idx)) (O(support) when ``rest`` is 0).

        ``old``, when given, must be ``rel[idx]`` as it is now (a caller that has just read it
        passes it on, so it is not gathered twice)."""
        if rest == 0.0:
            self._keep_only(idx, active)
            return
        rel = self.rel
        if old is None:
            old = rel[idx]
        new = old * active if rest == 1.0 else old * (active / rest)
        rel[idx] = new
        self.total += float(_sum(new - old))
        if rest != 1.0:
            self.scale *= rest
            self._tidy()
        else:
            self._tidy_total()  # the scale did not move

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

    def _tidy_total(self) -> None:
        if self.total > self.peak:
            self.peak = self.total
        elif self.total < self.peak * _RECOMPUTE_BELOW:
            self.total = self.peak = self._exact_total()

    def _tidy(self) -> None:
        self._tidy_total()
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


class Spread:
    """``lo = min(0, min values)`` and ``hi = max(0, max values)`` of integer members that move by
    one step at a time, kept in O(members moved); an unbounded supply of members sits at 0.

    ``n_lo`` and ``n_hi`` count the members at ``lo`` (when ``lo < 0``) and at ``hi`` (when
    ``hi > 0``); a move keeps them exact from the moved members' values alone, except when the
    last member leaves an extreme inwards: the new extreme's count is then read from the
    histogram. The histogram (members per value: a numpy window ``[base, base + len(hist))``
    while the extremes fit in ``window`` values, and the dict ``far`` outside it) is brought up
    to date lazily, a batch of pending moves at a time, only for that read or when the batch is
    long. The count at 0 is never read (the supply at 0 makes it unbounded) and is not kept.

    ``values`` are the members' values to start from (zeros stand for the supply). With
    ``live=True`` they are the owner's live array, which it updates *before* each :meth:`move`:
    while it has at most ``scan_limit`` entries, a count is a scan of it and no histogram is kept
    (cheaper up to some ten thousand members); past that, the histogram is built from it once and
    kept from then on.
    """

    __slots__ = (
        "lo",
        "hi",
        "n_lo",
        "n_hi",
        "base",
        "hist",
        "far",
        "window",
        "values",
        "scan_limit",
        "_stale",
        "_pending",
        "_low",
        "_high",
    )

    def __init__(
        self,
        values: np.ndarray | None = None,
        *,
        live: bool = False,
        window: int | None = None,
        scan_limit: int | None = None,
    ) -> None:
        self.window = max(8, SPREAD_WINDOW if window is None else int(window))
        self.scan_limit = SPREAD_SCAN if scan_limit is None else int(scan_limit)
        self.values = values
        self.lo = self.hi = self.n_lo = self.n_hi = 0
        if values is not None and len(values):
            self.lo = min(0, int(values.min()))
            self.hi = max(0, int(values.max()))
            self.n_lo = int(np.count_nonzero(values == self.lo)) if self.lo < 0 else 0
            self.n_hi = int(np.count_nonzero(values == self.hi)) if self.hi > 0 else 0
        # Live values few enough to scan: no histogram until they outgrow the scan (as move()).
        self._rebuild(
            histogram=not (live and values is not None and len(values) <= self.scan_limit)
        )
        if not live:
            self.values = None

    def _rebuild(self, histogram: bool = True) -> None:
        """The histogram from ``values`` (empty without them); no move pending. Without
        ``histogram``, none is built: counts scan the values."""
        self.base = -4
        self.hist = np.zeros(8, dtype=np.int32)  # counts never exceed the members
        self.far: dict[int, int] = {}
        self._pending: list[tuple[np.ndarray, int]] = []  # moves not yet in the histogram
        self._low, self._high = self.lo, self.hi  # the extremes reached by the pending moves
        self._stale = not histogram  # True while the histogram is not kept (values are scanned)
        values = self.values
        if values is None or not len(values) or not histogram:
            return
        # From within move(), values already hold the move that lo and hi do not yet show.
        low, high = min(self.lo, int(values.min())), max(self.hi, int(values.max()))
        self._low, self._high = low, high
        moved = values[values != 0]
        if self._fit(low, high):
            self.hist += np.bincount(moved - self.base, minlength=len(self.hist)).astype(np.int32)
        else:
            for v, c in Counter(moved.tolist()).items():
                self._add(v, c)

    def count(self, v: int) -> int:
        """How many members sit at ``v`` (not meaningful at 0)."""
        if self._stale:
            values = self.values
            assert values is not None
            if len(values) <= self.scan_limit:
                return int(np.count_nonzero(values == v))
            self._rebuild()
        elif self._pending:
            self._apply()
        i = v - self.base
        if 0 <= i < len(self.hist):
            return int(self.hist[i])
        return self.far.get(v, 0)

    def move(self, old: np.ndarray, step: int) -> None:
        """Move the members now at the values ``old`` (one entry per member; the array is kept
        until applied, so it must not change) by ``step`` (+1 or -1)."""
        vals = old.tolist()
        lo, hi = self.lo, self.hi
        values = self.values
        if values is not None and len(values) <= self.scan_limit:
            self._stale = True  # few members: counts scan them, no histogram is kept
        elif self._stale:
            self._rebuild()  # values already hold this move
        else:
            self._pending.append((old, step))
        # list.count is cheaper than min() or max() on a few dozen ints, and most counts are 0.
        if step < 0:
            k = vals.count(lo)
            if k:  # the lowest members moved out: one step lower
                self.lo, self.n_lo = lo - 1, k
                if lo - 1 < self._low:
                    self._low = lo - 1
            elif lo < 0:
                self.n_lo += vals.count(lo + 1)
            if hi > 0:
                k = vals.count(hi)
                if k:
                    self.n_hi -= k
                    if not self.n_hi:  # every member at hi moved in
                        self.hi = hi - 1
                        self.n_hi = self.count(hi - 1) if hi > 1 else 0
        else:
            k = vals.count(hi)
            if k:
                self.hi, self.n_hi = hi + 1, k
                if hi + 1 > self._high:
                    self._high = hi + 1
            elif hi > 0:
                self.n_hi += vals.count(hi - 1)
            if lo < 0:
                k = vals.count(lo)
                if k:
                    self.n_lo -= k
                    if not self.n_lo:
                        self.lo = lo + 1
                        self.n_lo = self.count(lo + 1) if lo < -1 else 0
        if len(self._pending) >= SPREAD_PENDING:
            self._apply()

    def _apply(self) -> None:
        """Bring the histogram up to date with the pending moves."""
        pending, self._pending = self._pending, []
        low, high = self._low, self._high
        self._low, self._high = self.lo, self.hi
        fits = (low >= self.base and high < self.base + len(self.hist)) or self._fit(low, high)
        if len(pending) > 1:
            batches = []
            for step in (-1, 1):
                olds = [old for old, s in pending if s == step]
                if olds:
                    batches.append((olds[0] if len(olds) == 1 else np.concatenate(olds), step))
            pending = batches
        for old, step in pending:
            if fits:
                at = old - self.base
                np.subtract.at(self.hist, at, _ONE)
                np.add.at(self.hist, at + step, _ONE)
            else:
                self._move_apart(old, step)

    def _fit(self, low: int, high: int) -> bool:
        """Lay the window over ``low .. high`` with room to spare, if it may be that wide; every
        count (window and dict) moves into it. False when they are too far apart.

        A refit asks for at most half the widest window, so a spread hovering near the limit
        does not refit on every batch.
        """
        need = high - low + 1
        widest = self.window
        if self.values is not None:  # no wider than twice the members (but 1024 at least)
            widest = min(widest, max(1024, 2 * len(self.values)))
        if 2 * need > widest:
            return False
        length = min(widest, max(2 * len(self.hist), 2 * need))
        base = low - (length - need) // 2
        hist = np.zeros(length, dtype=np.int32)
        old_lo = max(self.base, base)
        old_hi = min(self.base + len(self.hist), base + length)
        if old_lo < old_hi:
            hist[old_lo - base : old_hi - base] = self.hist[old_lo - self.base : old_hi - self.base]
        for v, c in self.far.items():
            hist[v - base] += c  # every member lies within low .. high, inside the new window
        self.base, self.hist, self.far = base, hist, {}
        return True

    def _add(self, v: int, c: int) -> None:
        i = v - self.base
        if 0 <= i < len(self.hist):
            self.hist[i] += c
            return
        c += self.far.get(v, 0)
        if c:
            self.far[v] = c
        else:
            del self.far[v]

    def _move_apart(self, old: np.ndarray, step: int) -> None:
        """Moves when the extremes are too far apart for the window: members whose value stays
        inside it move in numpy, the others in the dict (grouped by value)."""
        at = old - self.base
        inside = (at >= 1) & (at < len(self.hist) - 1)
        near = at[inside]
        if len(near):
            np.subtract.at(self.hist, near, _ONE)
            np.add.at(self.hist, near + step, _ONE)
        if len(near) < len(at):
            for v, c in Counter(old[~inside].tolist()).items():
                self._add(v, -c)
                self._add(v + step, c)


__all__ = [
    "CONSTANTS",
    "NEGATION",
    "ScaledWeights",
    "SlotMap",
    "Spread",
    "check_names_known",
    "literal_text",
    "parse_literal",
]
