"""The comparison of each learner with the serving one: exact McNemar p-values."""

from __future__ import annotations

import itertools

import pytest
from scipy.stats import binomtest

from service.accounting import mcnemar_exact
from tests.service.harness import Running

PAIRS = [(0, 0), (1, 0), (0, 1), (3, 3), (5, 0), (10, 2), (2, 10), (7, 8), (25, 11), (40, 60)]
PAIRS += [(1, 2500), (1200, 1300), (900, 1500), (3000, 2000), (12, 4000)]  # the float path


@pytest.mark.parametrize(("b", "c"), PAIRS)
def test_exact_mcnemar_equals_scipy_binomial_test(b: int, c: int) -> None:
    # Reference: scipy.stats.binomtest, two-sided, p = 1/2 on the discordant pairs (the exact
    # McNemar test, McNemar 1947, Psychometrika 12(2)). With no discordant pair p = 1.
    expected = 1.0 if b + c == 0 else binomtest(min(b, c), b + c, 0.5).pvalue
    assert mcnemar_exact(b, c) == pytest.approx(expected, rel=1e-9, abs=1e-300)
    assert mcnemar_exact(b, c) == mcnemar_exact(c, b)


def test_small_cases_worked_by_hand() -> None:
    # b = 5, c = 0: p = 2 * C(5, 0) / 2^5 = 1/16 (the formula above, worked by hand).
    assert mcnemar_exact(5, 0) == 1 / 16
    # b = 2, c = 1: p = min(1, 2 * (C(3,0) + C(3,1)) / 8) = 1.
    assert mcnemar_exact(2, 1) == 1.0
    # b = 6, c = 1: 2 * (1 + 7) / 128 = 0.125.
    assert mcnemar_exact(6, 1) == 0.125


def test_compare_counts_disagreements_on_labelled_predictions(service: Running) -> None:
    body = {
        "stream": "pair",
        "features": ["a", "b"],
        "learners": [
            {"name": "neg", "kind": "elimination", "negations": True},
            {"name": "mono", "kind": "elimination"},
        ],
        "serve": "neg",
    }
    assert service.post("/v1/streams", json=body).status_code == 201
    # Nobody learns in between (all predicted first): "neg" always votes 0, "mono" votes 1 only
    # on {a, b}. Six predictions on {a, b}: four labelled 1, two labelled 0. On those labelled 1
    # only the serving "neg" is wrong (c = 4); on those labelled 0 only "mono" is (b = 2).
    items = [{"id": f"p{i}", "features": ["a", "b"]} for i in range(6)]
    answers = service.post("/v1/streams/pair/predict", json={"items": items}).json()["items"]
    assert {tuple(a["votes"].values()) for a in answers} == {(0, 1)}
    labels = [{"id": f"p{i}", "label": int(i < 4)} for i in range(6)]
    service.post("/v1/streams/pair/feedback", json={"items": labels})
    # One more prediction without a label and one example: neither enters the comparison.
    service.post("/v1/streams/pair/predict", json={"features": ["a"]})
    service.post("/v1/streams/pair/examples", json={"features": ["b"], "label": 0})
    compare = service.get("/v1/streams/pair/compare").json()
    assert compare["serve"] == "neg"
    rows = {r["name"]: r for r in compare["learners"]}
    assert rows["mono"]["compared"] == 6
    assert (rows["mono"]["only_this_wrong"], rows["mono"]["only_served_wrong"]) == (2, 4)
    assert rows["mono"]["served_mistakes"] == 2 and rows["neg"]["served_mistakes"] == 4
    # Exact McNemar for b = 2, c = 4: 2 * (C(6,0) + C(6,1) + C(6,2)) / 64 = 44 / 64.
    assert rows["mono"]["p_value"] == pytest.approx(44 / 64)
    assert rows["neg"]["p_value"] == 1.0 and rows["neg"]["only_this_wrong"] == 0
    # Sorted by served mistakes: fewest first.
    assert [r["name"] for r in compare["learners"]] == ["mono", "neg"]


def test_the_float_path_agrees_with_exact_sums_where_both_apply() -> None:
    from fractions import Fraction
    from math import comb

    for b, c in itertools.product([900, 1000, 1100], [1000, 1150]):
        n, k = b + c, min(b, c)
        exact = float(min(Fraction(1), Fraction(2 * sum(comb(n, i) for i in range(k + 1)), 2**n)))
        assert mcnemar_exact(b, c) == pytest.approx(exact, rel=1e-9)
