"""The demo generator is reproducible and plants exactly what streams.json says it plants."""

from __future__ import annotations

import json
import math
from datetime import datetime
from pathlib import Path
from typing import Any

import pytest
from scipy.stats import binomtest

from demo_data import generate

HERE = Path(generate.__file__).resolve().parent
CATALOGUE = json.loads((HERE / "streams.json").read_text(encoding="utf-8"))
STREAMS = {entry["stream"]: entry for entry in CATALOGUE["streams"]}


def records(entry: dict[str, Any]) -> list[dict[str, Any]]:
    with (HERE / entry["file"]).open(encoding="utf-8") as handle:
        return [json.loads(line) for line in handle]


def when(text: str) -> datetime:
    return datetime.fromisoformat(text)


def verdict(rule: dict[str, Any], features: list[str] | dict[str, float]) -> int:
    """The planted rule, evaluated here from its description (independently of the generator)."""
    if "all" in rule or "any" in rule:
        on = set(features)
        literals = rule["all"] if "all" in rule else rule["any"]
        truths = [name[1:] not in on if name[0] == "!" else name in on for name in literals]
        return int(all(truths)) if "all" in rule else int(any(truths))
    assert isinstance(features, dict)
    return int(any(margin_of(half, features) > 0 for half in rule["halfspaces"]))


def margin_of(half: dict[str, Any], x: dict[str, float]) -> float:
    return sum(w * x.get(name, 0.0) for name, w in half["weights"].items()) + half["bias"]


def test_same_seed_same_bytes_and_the_committed_files_are_its_output(tmp_path: Path) -> None:
    first = generate.generate(tmp_path / "a")
    second = generate.generate(tmp_path / "b")
    assert [p.name for p in first] == [p.name for p in second]
    for a, b in zip(first, second, strict=True):
        assert a.read_bytes() == b.read_bytes(), a.name
        assert (HERE / a.name).read_bytes() == a.read_bytes(), f"{a.name} is stale: regenerate"


def test_small_enough_to_commit() -> None:
    total = sum((HERE / e["file"]).stat().st_size for e in STREAMS.values())
    total += (HERE / "streams.json").stat().st_size
    assert total < 1_000_000


@pytest.mark.parametrize("name", sorted(STREAMS))
def test_records_are_well_formed(name: str) -> None:
    entry = STREAMS[name]
    rows = records(entry)
    assert len(rows) == entry["records"]
    assert len({r["id"] for r in rows}) == len(rows)
    start, end = when(entry["span"]["start"]), when(entry["span"]["end"])
    low, high = entry["delay"]["range_seconds"]
    previous = start
    for row in rows:
        assert set(row) == {"id", "at", "label_at", "features", "label"}
        at, label_at = when(row["at"]), when(row["label_at"])
        assert previous <= at < end  # in time order, inside the span
        previous = at
        assert low <= (label_at - at).total_seconds() <= high
        assert row["label"] in (0, 1)
    assert low >= 900 and high <= 5 * 86400  # 15 minutes to 5 days, as documented
    assert sum(r["label"] for r in rows) == entry["positives"]


@pytest.mark.parametrize("name", sorted(STREAMS))
def test_labels_follow_the_planted_rule_except_the_flipped_ones(name: str) -> None:
    entry = STREAMS[name]
    planted = entry["planted"]
    change = when(planted["change_at"])
    wrong = {"before": 0, "after": 0}
    counts = {"before": 0, "after": 0}
    for row in records(entry):
        part = "before" if when(row["at"]) < change else "after"
        counts[part] += 1
        wrong[part] += int(verdict(planted[part], row["features"]) != row["label"])
    assert wrong == planted["flipped"]
    assert counts == {"before": planted["records_before"], "after": planted["records_after"]}
    noise = planted["noise"]
    flipped = wrong["before"] + wrong["after"]
    if noise == 0:
        assert flipped == 0
    else:
        # The flips are Bernoulli(noise) per record: a two-sided exact binomial test (scipy's
        # binomtest) must not reject the documented rate.
        assert binomtest(flipped, len(records(entry)), noise).pvalue > 1e-3


@pytest.mark.parametrize("name", sorted(STREAMS))
def test_the_rule_change_is_visible(name: str) -> None:
    """After the change the old rule disagrees with a real share of the labels."""
    entry = STREAMS[name]
    planted = entry["planted"]
    change = when(planted["change_at"])
    after = [r for r in records(entry) if when(r["at"]) >= change]
    stale = sum(verdict(planted["before"], r["features"]) != r["label"] for r in after)
    assert stale >= 0.05 * len(after)
    positives = [r["label"] for r in records(entry)]
    assert 0.05 < sum(positives) / len(positives) < 0.6


def test_the_scores_keep_the_declared_margin() -> None:
    entry = STREAMS["lockers-reweigh"]
    planted = entry["planted"]
    change = when(planted["change_at"])
    margins = {learner.get("margin") for learner in entry["panel"]["learners"]} - {None}
    assert margins == {planted["before"]["margin"]}
    for part in ("before", "after"):
        for half in planted[part]["halfspaces"]:
            norm = math.sqrt(sum(w * w for w in half["weights"].values()) + half["bias"] ** 2)
            assert norm == pytest.approx(1.0, abs=1e-5)  # (w, b) is a unit vector
    for row in records(entry):
        rule = planted["before"] if when(row["at"]) < change else planted["after"]
        x = row["features"]
        assert all(-1.0 <= v <= 1.0 for v in x.values())
        for half in rule["halfspaces"]:
            assert abs(margin_of(half, x)) >= rule["margin"] - 1e-9


def test_the_panels_declare_what_is_planted() -> None:
    hold = STREAMS["lockers-hold"]
    halving = next(x for x in hold["panel"]["learners"] if x["kind"] == "halving")
    target = set(hold["planted"]["before"]["all"])
    assert any(set(rule) == target for rule in halving["rules"])  # the class holds the target
    escalate = STREAMS["lockers-escalate"]
    relevant = {x["relevant"] for x in escalate["panel"]["learners"] if "relevant" in x}
    assert relevant == {len(escalate["planted"]["before"]["any"])}
    for entry in STREAMS.values():
        panel = entry["panel"]
        names = [x["name"] for x in panel["learners"]]
        assert panel["stream"] == entry["stream"]
        assert panel["serve"] in names and len(set(names)) == len(names) <= 6
        assert panel["on_exceed"] in ("keep", "restart")
