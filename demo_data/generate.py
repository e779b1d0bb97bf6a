"""Generate the demo scenario: Quillhaven Lockers, an invented parcel-locker network.

Every parcel dropped into a Quillhaven locker is screened at the door by fifty yes/no flags
(``label_reprinted``, ``weight_mismatch``, ``sender_new``, ...) and, on the scale-equipped lockers,
five numeric scores between -1 and 1. Hours to days later the depot's inspection verdict comes
back. Three verdicts are learned, each its own stream and file:

``lockers-hold``  (held for inspection; a conjunction of flags)
    Before the change: ``weight_mismatch and label_reprinted and sender_new``; from the
    change on, the depot's new policy: ``weight_mismatch and seal_broken``. The hold decision is
    taken by the depot's own rule engine, so its verdicts carry no label noise.
``lockers-escalate``  (escalated to security; a sparse disjunction of flags)
    Before: ``sender_blocklisted or battery_undeclared or xray_alert``; after: the X-ray alarm is
    recalibrated and drops out, and ``odour_reported``, ``contents_undeclared`` and
    ``locker_forced`` come in. One verdict in a hundred is recorded wrongly (flipped).
``lockers-reweigh``  (sent back to be re-weighed; a linear rule over the scores with a margin)
    Before: ``w . x + b > 0`` with ``(w, b)`` a unit vector, and no drop-off closer than the margin
    to the boundary (the depot re-weighs clear cases only). After: some scales under-report, and a
    parcel is also re-weighed when ``weight_gap`` is far below zero: the verdict is a union of two
    halfspaces (each with the margin), which no single halfspace follows. One verdict in two
    hundred is flipped.

The flipped verdicts formally break the noise-free assumptions of Winnow and of the perceptron
with a declared margin; the few that fall before the change stay within their ceilings' slack
(``streams.json`` says how many there were), while the weighted majority's ceiling allows for them
outright (it grows with the best rule's mistakes). What breaks the ceilings is the rule change.

Each record is ``{"id", "at", "label_at", "features", "label"}``: ``at`` the drop-off time and
``label_at`` when its verdict arrives (ISO 8601, UTC); ``features`` is the list of flags that are
on, or a mapping of score name to value. Which rule applies is decided by the drop-off time.
The file ``streams.json`` describes every stream: its planted rules, the change time, the noise
rate and how many labels were actually flipped, and the panel of learners the demo creates.

The output is a pure function of :data:`SEED` (numpy's PCG64 generator, one child seed per
stream): running ``python -m demo_data.generate`` again writes the same bytes.
"""

from __future__ import annotations

import argparse
import json
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np

SEED = 20260302
HERE = Path(__file__).resolve().parent
SCENARIO = "Quillhaven Lockers (an invented parcel-locker network)"
START = datetime(2026, 3, 2, tzinfo=UTC)
DAYS = 28
CHANGE_DAY = 15
# Drop-offs by hour of day (relative weights): quiet at night, busy after work.
HOURLY = [1, 1, 1, 1, 1, 2, 4, 7, 9, 9, 8, 8, 9, 9, 8, 8, 9, 11, 12, 11, 9, 6, 3, 2]

FLAGS = [
    "label_reprinted", "weight_mismatch", "sender_new", "sender_verified", "sender_blocklisted",
    "seal_broken", "customs_form_missing", "battery_declared", "battery_undeclared",
    "parcel_oversize", "parcel_underweight", "address_mismatch", "address_po_box",
    "recipient_new", "recipient_flagged", "paid_cash", "paid_voucher", "prepaid_label",
    "label_handwritten", "label_damaged", "barcode_unreadable", "barcode_duplicate",
    "locker_forced", "locker_door_ajar", "locker_sensor_fault", "dropoff_night",
    "dropoff_weekend", "dropoff_holiday", "route_international", "route_remote", "route_changed",
    "reroute_requested", "dimensions_estimated", "contents_liquid", "contents_fragile",
    "contents_perishable", "contents_undeclared", "value_high", "value_undeclared",
    "insurance_added", "courier_override", "scan_skipped", "photo_missing", "photo_blurry",
    "repeat_sender_24h", "bulk_dropoff", "tape_nonstandard", "odour_reported", "xray_alert",
    "manual_entry",
]  # fmt: skip
SCORES = ["weight_gap", "route_risk", "sender_trust", "declared_value", "dwell_time"]

# The shortlist of flags the depot has ever used in a hold rule: the halving learner's class is
# every conjunction of at most three literals over it.
HOLD_SHORTLIST = [
    "weight_mismatch", "label_reprinted", "sender_new", "seal_broken", "parcel_oversize",
    "paid_cash",
]  # fmt: skip


def conjunctions(flags: Sequence[str], most: int) -> list[list[str]]:
    """Every conjunction of at most ``most`` literals over ``flags`` (no flag twice)."""
    out: list[list[str]] = [[]]
    frontier: list[tuple[int, list[str]]] = [(0, [])]
    for _ in range(most):
        grown: list[tuple[int, list[str]]] = []
        for start, rule in frontier:
            for i in range(start, len(flags)):
                for literal in (flags[i], "!" + flags[i]):
                    grown.append((i + 1, [*rule, literal]))
        out.extend(rule for _, rule in grown)
        frontier = grown
    return out


def _unit(weights: Mapping[str, float], bias: float) -> dict[str, Any]:
    """A halfspace ``w . x + b > 0`` scaled so that ``(w, b)`` is a unit vector."""
    norm = float(np.sqrt(sum(v * v for v in weights.values()) + bias * bias))
    return {
        "weights": {k: round(v / norm, 6) for k, v in weights.items()},
        "bias": round(bias / norm, 6),
    }


MARGIN = 0.35
# Before the change: one halfspace over the scores. After: the scales at some lockers start to
# under-report, and a parcel is also re-weighed when it seems far lighter than declared, so the
# verdict becomes a union of two halfspaces, which no single halfspace can follow.
REWEIGH_HEAVY = _unit(
    {"weight_gap": 0.8, "route_risk": 0.45, "sender_trust": -0.5, "declared_value": 0.3,
     "dwell_time": 0.1},
    -0.35,
)  # fmt: skip
REWEIGH_LIGHT = _unit({"weight_gap": -1.0}, -0.45)

STREAMS: list[dict[str, Any]] = [
    {
        "stream": "lockers-hold",
        "title": "Held for inspection",
        "kind": "flags",
        "records": 900,
        "noise": 0.0,
        "cohort": 0.3,  # share of drop-offs that look like the current hold rule
        "delay_median_hours": 10.0,
        "before": {"all": ["weight_mismatch", "label_reprinted", "sender_new"]},
        "after": {"all": ["weight_mismatch", "seal_broken"]},
        "panel": {
            "features": FLAGS,
            "learners": [
                {"name": "elimination", "kind": "elimination", "negations": True},
                {"name": "monotone", "kind": "elimination", "negations": False},
                {"name": "halving", "kind": "halving", "rules": conjunctions(HOLD_SHORTLIST, 3)},
                {
                    "name": "winnow-and",
                    "kind": "winnow",
                    "variant": "winnow2",
                    "target": "conjunction",
                    "relevant": 3,
                },
                {"name": "perceptron", "kind": "perceptron", "variant": "classic"},
                {"name": "majority", "kind": "weighted-majority", "beta": 0.5},
            ],
            "serve": "elimination",
            "on_exceed": "restart",
            "near": 0.8,
        },
    },
    {
        "stream": "lockers-escalate",
        "title": "Escalated to security",
        "kind": "flags",
        "records": 900,
        "noise": 0.01,
        "cohort": 0.0,
        "delay_median_hours": 20.0,
        "before": {"any": ["sender_blocklisted", "battery_undeclared", "xray_alert"]},
        "after": {
            "any": ["sender_blocklisted", "battery_undeclared", "odour_reported",
                    "contents_undeclared", "locker_forced"]
        },  # fmt: skip
        "panel": {
            "features": FLAGS,
            "learners": [
                {"name": "winnow2", "kind": "winnow", "variant": "winnow2", "relevant": 3},
                {"name": "winnow1", "kind": "winnow", "variant": "winnow1", "relevant": 3},
                {"name": "balanced", "kind": "winnow", "variant": "balanced"},
                {"name": "majority", "kind": "weighted-majority", "beta": 0.5},
                {"name": "perceptron", "kind": "perceptron", "variant": "classic"},
            ],
            "serve": "winnow2",
            "on_exceed": "keep",
            "near": 0.8,
        },
    },
    {
        "stream": "lockers-reweigh",
        "title": "Sent back to be re-weighed",
        "kind": "scores",
        "records": 900,
        "noise": 0.005,
        "delay_median_hours": 4.0,
        "before": {"halfspaces": [REWEIGH_HEAVY], "margin": MARGIN},
        "after": {"halfspaces": [REWEIGH_HEAVY, REWEIGH_LIGHT], "margin": MARGIN},
        "panel": {
            "features": SCORES,
            "learners": [
                {"name": "perceptron", "kind": "perceptron", "variant": "classic",
                 "margin": MARGIN},
                {"name": "margin", "kind": "perceptron", "variant": "margin", "margin": MARGIN,
                 "tau": 0.5, "eta": 1.0},
                {"name": "averaged", "kind": "perceptron", "variant": "averaged",
                 "margin": MARGIN},
                {"name": "pa1", "kind": "passive-aggressive", "variant": "pa1",
                 "aggressiveness": 0.5, "bias": 1.0, "margin": MARGIN},
                {"name": "no-margin", "kind": "perceptron", "variant": "classic"},
            ],
            "serve": "perceptron",
            "on_exceed": "keep",
            "near": 0.8,
        },
    },
]  # fmt: skip


# -- the planted rules ------------------------------------------------------------------------


def label_of(rule: Mapping[str, Any], features: Sequence[str] | Mapping[str, float]) -> int:
    """The planted rule's verdict on one drop-off (before any label noise)."""
    if "all" in rule or "any" in rule:
        on = set(features)
        literals = rule.get("all", rule.get("any"))
        hits = [(lit[1:] not in on) if lit.startswith("!") else (lit in on) for lit in literals]
        return int(all(hits) if "all" in rule else any(hits))
    assert isinstance(features, Mapping)
    return int(any(score_of(half, features) > 0 for half in rule["halfspaces"]))


def score_of(half: Mapping[str, Any], features: Mapping[str, float]) -> float:
    """``w . x + b`` of one halfspace."""
    return sum(w * features.get(k, 0.0) for k, w in half["weights"].items()) + half["bias"]


# -- drawing ----------------------------------------------------------------------------------


def _times(rng: np.random.Generator, count: int) -> np.ndarray:
    """Sorted drop-off times in seconds after START, following the hourly profile."""
    hours = np.asarray(HOURLY, dtype=float)
    day = rng.integers(0, DAYS, size=count)
    hour = rng.choice(24, size=count, p=hours / hours.sum())
    second = rng.integers(0, 3600, size=count)
    return np.sort(day * 86400 + hour * 3600 + second)


def _delays(rng: np.random.Generator, count: int, median_hours: float) -> np.ndarray:
    """Verdict delays in seconds: log-normal around the median, from 15 minutes to 5 days."""
    raw = rng.lognormal(mean=np.log(median_hours * 3600), sigma=0.9, size=count)
    return np.clip(np.round(raw), 900, 5 * 86400).astype(np.int64)


def _flags(rng: np.random.Generator, spec: Mapping[str, Any], rules: list[Any]) -> list[list[str]]:
    """The flags that are on, per drop-off; a share ``cohort`` is drawn to fit the current rule."""
    count = len(rules)
    base = rng.uniform(0.02, 0.16, size=len(FLAGS))
    for name in spec["before"].get("any", []) + spec["after"].get("any", []):
        base[FLAGS.index(name)] = 0.04  # escalation triggers are rare one by one
    draws = rng.random((count, len(FLAGS))) < base
    cohort = rng.random(count) < spec["cohort"]
    out = []
    for row, in_cohort, rule in zip(draws, cohort, rules, strict=True):
        if in_cohort:
            for literal in rule["all"]:
                row[FLAGS.index(literal.lstrip("!"))] = not literal.startswith("!")
        out.append([FLAGS[i] for i in np.flatnonzero(row)])
    return out


def _scores(rng: np.random.Generator, rules: list[Any]) -> list[dict[str, float]]:
    """Score vectors in [-1, 1], none closer than the margin to any boundary of its rule."""
    out = []
    for rule in rules:
        while True:
            values = np.round(rng.uniform(-1.0, 1.0, size=len(SCORES)), 3)
            item = {k: float(v) for k, v in zip(SCORES, values, strict=True)}
            if all(abs(score_of(half, item)) >= rule["margin"] for half in rule["halfspaces"]):
                out.append(item)
                break
    return out


def _iso(seconds: float) -> str:
    return (START + timedelta(seconds=int(seconds))).strftime("%Y-%m-%dT%H:%M:%SZ")


def build(spec: Mapping[str, Any], index: int) -> tuple[list[dict[str, Any]], dict[str, Any]]:
    """One stream's records and its description for ``streams.json``."""
    rng = np.random.default_rng([SEED, index])
    count = int(spec["records"])
    times = _times(rng, count)
    change = CHANGE_DAY * 86400
    rules = [spec["before"] if t < change else spec["after"] for t in times]
    features: list[Any]
    features = _flags(rng, spec, rules) if spec["kind"] == "flags" else _scores(rng, rules)
    delays = _delays(rng, count, float(spec["delay_median_hours"]))
    flips = rng.random(count) < float(spec["noise"])
    prefix = spec["stream"].removeprefix("lockers-")
    records: list[dict[str, Any]] = []
    flipped = {"before": 0, "after": 0}
    for i in range(count):
        label = label_of(rules[i], features[i]) ^ int(flips[i])
        flipped["before" if times[i] < change else "after"] += int(flips[i])
        records.append(
            {
                "id": f"{prefix}-{i + 1:04d}",
                "at": _iso(times[i]),
                "label_at": _iso(times[i] + delays[i]),
                "features": features[i],
                "label": label,
            }
        )
    before = int((times < change).sum())
    description = {
        "stream": spec["stream"],
        "title": spec["title"],
        "file": f"{spec['stream']}.jsonl",
        "records": count,
        "positives": sum(int(r["label"]) for r in records),
        "span": {"start": _iso(0), "end": _iso(DAYS * 86400)},
        "planted": {
            "before": spec["before"],
            "change_at": _iso(change),
            "after": spec["after"],
            "records_before": before,
            "records_after": count - before,
            "noise": spec["noise"],
            "flipped": flipped,
        },
        "delay": {
            "replay": "column:label_at",
            "median_hours": spec["delay_median_hours"],
            "range_seconds": [int(delays.min()), int(delays.max())],
        },
        "panel": {"stream": spec["stream"], **spec["panel"]},
    }
    return records, description


def _pretty(value: Any, indent: str = "") -> str:
    """JSON with one key per line, but lists of plain values (and of such lists) on one line."""
    inner = indent + "  "
    if isinstance(value, dict) and value:
        rows = [f"{inner}{json.dumps(k)}: {_pretty(v, inner)}" for k, v in value.items()]
        return "{\n" + ",\n".join(rows) + "\n" + indent + "}"
    if isinstance(value, list) and any(isinstance(v, dict) for v in value):
        rows = [inner + _pretty(v, inner) for v in value]
        return "[\n" + ",\n".join(rows) + "\n" + indent + "]"
    return json.dumps(value, separators=(", ", ": "))


def generate(out_dir: Path = HERE) -> list[Path]:
    """Write every stream's JSON-lines file and ``streams.json`` into ``out_dir``."""
    out_dir.mkdir(parents=True, exist_ok=True)
    written = []
    described = []
    for index, spec in enumerate(STREAMS):
        records, description = build(spec, index)
        path = out_dir / description["file"]
        with path.open("w", encoding="utf-8", newline="\n") as handle:
            for record in records:
                handle.write(json.dumps(record, separators=(",", ":")) + "\n")
        written.append(path)
        described.append(description)
    catalogue = {
        "scenario": SCENARIO,
        "seed": SEED,
        "generator": "python -m demo_data.generate",
        "streams": described,
    }
    path = out_dir / "streams.json"
    path.write_text(_pretty(catalogue) + "\n", encoding="utf-8", newline="\n")
    written.append(path)
    return written


def main(argv: Sequence[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument(
        "--out", type=Path, default=HERE, help="folder to write into (default: demo_data/)"
    )
    args = parser.parse_args(argv)
    for path in generate(args.out):
        print(f"{path}  {path.stat().st_size:,} bytes")


if __name__ == "__main__":
    main()
