"""Per-item speed of every learner, against scikit-learn's partial_fit loop and a bare numpy loop.

Run: ``python -m benchmarks.learners`` (or ``make bench``). It prints figures and ratios measured in
this one process; it asserts nothing. Goals it reports against:

- every learner at least 100x faster per item than ``Perceptron.partial_fit`` one row at a time;
- within 3x of a bare numpy loop of the classic perceptron update on dense rows (the floor for
  per-item Python work);
- at least 100,000 sparse items per second (predict + learn) for elimination and Winnow;
- Winnow with n = 10^8 declared features under 50 MB resident after 10^5 items (a subprocess).

It also prints the per-label cost of a six-learner panel as a stream runs it: every learner learns
the label, then its ceiling is read, once with the full ``ceiling()`` record and once with the
cheap ``ceiling_value()`` and ``counts`` that the service reads after every label.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from collections.abc import Callable
from typing import Any

import numpy as np
from rich.console import Console
from rich.table import Table

import learners
from learners.features import Encoded, FeatureSpace

PANEL: list[tuple[str, dict[str, Any]]] = [
    ("elimination", {}),
    ("elimination", {"negations": True}),
    ("halving", {}),
    ("perceptron", {"variant": "classic"}),
    ("perceptron", {"variant": "margin", "tau": 1.0, "eta": 0.5}),
    ("perceptron", {"variant": "averaged"}),
    ("perceptron", {"variant": "voted"}),
    ("passive-aggressive", {"variant": "pa1", "aggressiveness": 1.0}),
    ("winnow", {"variant": "winnow2"}),
    ("winnow", {"variant": "winnow1"}),
    ("winnow", {"variant": "balanced"}),
    ("weighted-majority", {}),
]

# The six learners a stream commonly runs, as in the service's panel.
SERVICE_PANEL: list[tuple[str, dict[str, Any]]] = [
    ("elimination", {}),
    ("elimination", {"negations": True}),
    ("perceptron", {"margin": 0.25}),
    ("winnow", {"relevant": 3}),
    ("weighted-majority", {}),
    ("passive-aggressive", {"variant": "pa1"}),
]


def label_of(name: str, params: dict[str, Any]) -> str:
    extra = ",".join(f"{k}={v}" for k, v in params.items())
    return f"{name}({extra})" if extra else name


def sparse_stream(count: int, seed: int = 1) -> tuple[list[list[str]], list[int]]:
    """30 active flags per item from a vocabulary of 20,000 names; label: a 3-flag disjunction."""
    rng = np.random.default_rng(seed)
    vocab = [f"flag{i}" for i in rng.choice(10**6, size=20_000, replace=False)]
    relevant = set(vocab[:3])
    weights = 1.0 / np.arange(1, len(vocab) + 1)  # a few common flags, many rare ones
    weights /= weights.sum()
    items, labels = [], []
    for _ in range(count):
        picks = rng.choice(len(vocab), size=30, replace=False, p=weights)
        item = [vocab[i] for i in picks]
        items.append(item)
        labels.append(int(any(f in relevant for f in item)))
    return items, labels


def dense_rows() -> tuple[np.ndarray, np.ndarray, list[str]]:
    from sklearn.datasets import load_breast_cancer  # bundled with scikit-learn, no download

    data = load_breast_cancer()
    # Scaled to [0, 1] per column: every learner accepts that range (Winnow needs it).
    low, high = data.data.min(axis=0), data.data.max(axis=0)
    x = (data.data - low) / (high - low)
    return x, data.target.astype(int), [f"c{i}" for i in range(x.shape[1])]


def make(kind: str, params: dict[str, Any], space: FeatureSpace, rows: int) -> Any:
    if kind == "halving":
        names = space.names[:6] if space.closed else [f"flag{i}" for i in range(6)]
        rules = [[n] for n in names] + [["!" + n] for n in names] + [[]]
        params = {"rules": rules}
    return learners.make(kind, features=space, **params)


def per_item(run: Callable[[], None], count: int) -> float:
    """Seconds per item of ``run`` (which processes ``count`` items), best of three."""
    best = float("inf")
    for _ in range(3):
        start = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - start)
    return best / count


def loop(learner: Any, encoded: list[Encoded], labels: list[int]) -> Callable[[], None]:
    def run() -> None:
        predict, learn = learner.predict, learner.learn
        for enc, y in zip(encoded, labels, strict=True):
            predict(enc)
            learn(enc, y)

    return run


def panel_per_label(
    space: FeatureSpace, encoded: list[Encoded], labels: list[int], cheap: bool
) -> float:
    """Seconds per label for the six-learner panel: learn, then read the ceiling and the state."""
    panel = [learners.make(kind, features=space, **params) for kind, params in SERVICE_PANEL]
    start = time.perf_counter()
    if cheap:
        for enc, y in zip(encoded, labels, strict=True):
            for learner in panel:
                learner.learn(enc, y)
                count = learner.updates if learner.counts == "updates" else learner.mistakes
                learners.standing(count, learner.ceiling_value(), learner.contradicted)
    else:
        for enc, y in zip(encoded, labels, strict=True):
            for learner in panel:
                learner.learn(enc, y)
                ceiling = learner.ceiling()
                count = learner.updates if ceiling.counts == "updates" else learner.mistakes
                learners.standing(count, ceiling, learner.contradicted)
    return (time.perf_counter() - start) / len(labels)


def fresh(encoded: list[Encoded]) -> list[Encoded]:
    """The same items without the views a previous run built and kept on them."""
    return [Encoded(enc.keys, enc.vals) for enc in encoded]


def bare_numpy(x: np.ndarray, y: np.ndarray) -> Callable[[], None]:
    signs = 2 * y - 1

    def run() -> None:
        w = np.zeros(x.shape[1] + 1)
        for row, s in zip(x, signs, strict=True):
            xb = np.append(row, 1.0)
            if s * (w @ xb) <= 0:
                w += s * xb

    return run


def sklearn_loop(x: np.ndarray, y: np.ndarray, count: int) -> Callable[[], None]:
    from sklearn.linear_model import Perceptron

    def run() -> None:
        model = Perceptron(eta0=1, penalty=None, shuffle=False)
        model.partial_fit(x[:1], y[:1], classes=[0, 1])
        for i in range(1, count):
            model.predict(x[i : i + 1])
            model.partial_fit(x[i : i + 1], y[i : i + 1])

    return run


WINNOW_MEMORY = """
import json, resource, sys
import numpy as np
from benchmarks.learners import sparse_stream
import learners
items, labels = sparse_stream(100_000, seed=5)
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
learner = learners.make("winnow", features=10**8, variant="winnow2", relevant=3)
for item, y in zip(items, labels):
    learner.predict(item)
    learner.learn(item, y)
after = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"growth_mb": (after - before) / 1024, "rss_mb": after / 1024,
                  "names": len(learner.space), "updates": learner.updates}))
"""


def main() -> None:
    console = Console(width=120)
    x, y, columns = dense_rows()
    dense_space = FeatureSpace(columns)
    dense_items = [dict(zip(columns, row.tolist(), strict=True)) for row in x]
    dense_enc = [dense_space.encode(item) for item in dense_items]
    labels = y.tolist()

    floor = per_item(bare_numpy(x, y), len(x))
    sk_count = 200
    sk = per_item(sklearn_loop(x, y, sk_count), sk_count)
    encode_cost = per_item(lambda: [dense_space.encode(i) for i in dense_items], len(x))
    unit_cost = 0.0
    if hasattr(Encoded, "unit"):  # Winnow's [0, 1] check, made once per item and kept on it
        unit_cost = per_item(lambda: [e.unit for e in fresh(dense_enc)], len(x)) - per_item(
            lambda: fresh(dense_enc), len(x)
        )

    sparse_items, sparse_labels = sparse_stream(20_000)
    sparse_space = FeatureSpace(10**6)
    sparse_enc = [sparse_space.encode(item) for item in sparse_items]
    sparse_encode = per_item(lambda: [sparse_space.encode(i) for i in sparse_items], 20_000)

    table = Table(title="Learners, predict + learn per item (best of 3; items pre-encoded)")
    for col in ("learner", "dense µs", "x bare numpy", "sklearn / this", "sparse µs", "sparse/s"):
        table.add_column(col, justify="right" if col != "learner" else "left")
    for kind, params in PANEL:
        if kind not in learners.KINDS:
            continue
        dense_t = per_item(
            lambda k=kind, p=params: loop(make(k, p, dense_space, len(x)), dense_enc, labels)(),
            len(x),
        )
        sparse_t = per_item(
            lambda k=kind, p=params: loop(
                make(k, p, sparse_space, 20_000), sparse_enc, sparse_labels
            )(),
            20_000,
        )
        table.add_row(
            label_of(kind, params),
            f"{dense_t * 1e6:.1f}",
            f"{dense_t / floor:.2f}",
            f"{sk / dense_t:.0f}",
            f"{sparse_t * 1e6:.1f}",
            f"{1 / sparse_t:,.0f}",
        )
    console.print(table)
    console.print(
        f"bare numpy classic perceptron loop: {floor * 1e6:.2f} µs/row; "
        f"scikit-learn Perceptron predict + partial_fit one row: {sk * 1e6:.0f} µs/row"
    )
    console.print(
        f"encoding (once per item, shared by a stream's panel): dense dict of 30 values "
        f"{encode_cost * 1e6:.1f} µs, sparse list of 30 flags {sparse_encode * 1e6:.1f} µs; "
        f"Winnow's [0, 1] check of a dense item, once per item: {unit_cost * 1e6:.1f} µs"
    )
    panel = Table(title="Six-learner panel, per label: learn, then read the ceiling (best of 3)")
    for col in ("items", "learn + ceiling() µs", "learn + ceiling_value() µs"):
        panel.add_column(col, justify="right" if col != "items" else "left")
    cheap = hasattr(learners.Learner, "ceiling_value")
    for name, space, encoded, ys in (
        ("sparse, 30 of 20,000 flags", sparse_space, sparse_enc, sparse_labels),
        ("dense, 30 values in [0, 1]", dense_space, dense_enc, labels),
    ):
        full = min(panel_per_label(space, encoded, ys, cheap=False) for _ in range(3))
        fast = (
            min(panel_per_label(space, encoded, ys, cheap=True) for _ in range(3)) if cheap else 0
        )
        panel.add_row(name, f"{full * 1e6:.1f}", f"{fast * 1e6:.1f}" if cheap else "-")
    console.print(panel)
    console.print("panel: " + ", ".join(label_of(kind, params) for kind, params in SERVICE_PANEL))
    if "winnow" in learners.KINDS:
        out = subprocess.run(
            [sys.executable, "-c", WINNOW_MEMORY], capture_output=True, text=True, check=True
        )
        mem = json.loads(out.stdout)
        console.print(
            f"winnow2, n = 10^8 declared, 10^5 items of 30 flags: resident growth "
            f"{mem['growth_mb']:.1f} MB (process {mem['rss_mb']:.0f} MB), "
            f"{mem['names']:,} names seen, {mem['updates']} updates; goal < 50 MB"
        )


if __name__ == "__main__":
    main()
