"""Where batches start to pay: a stream's cost per item for batches of 2 to 64 items, at once
(votes over the whole batch, ``Learner.skim`` over labelled ones) against item by item.

Run: ``python -m benchmarks.at_once`` (``make bench`` runs it too). It prints figures and asserts
nothing. In this process, no HTTP: one stream with the service benchmark's six-learner panel and
sparse items (``benchmarks.service``), warmed with 5000 labelled examples, then predict,
feedback and examples in batches of each size, both ways; CPU time per item, the least of a few
repeats, with the server's young-generation GC threshold. ``service.streams.BATCH_AT_ONCE`` and
``FEEDBACK_AT_ONCE`` are the sizes from which the stream goes at once; the answers and the ledger
are the same either way (``tests/service/test_streams.py``).
"""

from __future__ import annotations

import argparse
import gc
import time
from typing import Any

from rich.console import Console
from rich.table import Table

from benchmarks.service import PANEL, SPACE_SIZE, STREAM, Items
from service.settings import Settings
from service.streams import BATCH_AT_ONCE, FEEDBACK_AT_ONCE, Stream

SIZES = (2, 4, 8, 16, 24, 32, 64)
KINDS = ("predict", "feedback", "examples")


def config() -> dict[str, Any]:
    learners = [
        {
            "name": spec["name"],
            "kind": spec["kind"],
            "params": {k: v for k, v in spec.items() if k not in ("name", "kind")},
        }
        for spec in PANEL
    ]
    return {
        "stream": STREAM,
        "features": SPACE_SIZE,
        "learners": learners,
        "serve": PANEL[0]["name"],
        "label_wait_seconds": 1e9,
        "on_exceed": "keep",
        "near": 0.8,
        "webhook": None,
    }


def run(size: int, at_once: bool, total: int) -> dict[str, float]:
    """Seconds of CPU per item for each kind of batch of ``size`` items."""
    source = Items(7)
    stream = Stream(config(), 0.0, history_points=500, max_remembered=10**6)
    stream.at_once = stream.feedback_at_once = 1 if at_once else 10**9
    items, ys = source.draw(5000)
    stream.apply_examples(0.5, [(f"w{j}", items[j], ys[j]) for j in range(5000)])
    items, ys = source.draw(total)
    starts = range(0, total, size)
    ends = [min(s + size, total) for s in starts]
    spent: dict[str, float] = {}
    t0 = time.process_time()
    for s, e in zip(starts, ends, strict=True):
        stream.apply_predict(1.0 + s, [(f"b{j}", items[j]) for j in range(s, e)])
    spent["predict"] = time.process_time() - t0
    t0 = time.process_time()
    for s, e in zip(starts, ends, strict=True):
        stream.apply_feedback(1e5 + s, [(f"b{j}", ys[j]) for j in range(s, e)])
    spent["feedback"] = time.process_time() - t0
    items, ys = source.draw(total)
    t0 = time.process_time()
    for s, e in zip(starts, ends, strict=True):
        batch = [(f"e{j}", items[j], ys[j]) for j in range(s, e)]
        stream.apply_examples(2e5 + s, batch)
    spent["examples"] = time.process_time() - t0
    return {kind: seconds / total for kind, seconds in spent.items()}


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    parser.add_argument("--items", type=int, default=4096, help="items per kind and size")
    parser.add_argument("--repeats", type=int, default=2, help="runs per figure (least kept)")
    args = parser.parse_args(argv)
    gc.set_threshold(Settings().gc_young_threshold, *gc.get_threshold()[1:])
    table = Table(title="cost per item in a stream: at once / item by item (CPU µs)")
    table.add_column("batch", justify="right")
    for kind in KINDS:
        table.add_column(kind, justify="right")
    for size in SIZES:
        best = {mode: {kind: float("inf") for kind in KINDS} for mode in ("at once", "one by one")}
        for _ in range(args.repeats):
            for mode in best:
                figures = run(size, mode == "at once", args.items)
                for kind in KINDS:
                    best[mode][kind] = min(best[mode][kind], figures[kind])
        cells = [
            f"{best['at once'][k] * 1e6:,.1f} / {best['one by one'][k] * 1e6:,.1f}" for k in KINDS
        ]
        marks = "".join(
            mark for mark, at in (("*", BATCH_AT_ONCE), ("**", FEEDBACK_AT_ONCE)) if size == at
        )
        table.add_row(f"{size} {marks}".strip(), *cells)
    console = Console()
    console.print(table)
    console.print(
        f"* BATCH_AT_ONCE = {BATCH_AT_ONCE}: from this size a stream votes on predict batches and "
        f"learns examples at once; ** FEEDBACK_AT_ONCE = {FEEDBACK_AT_ONCE}: feedback. "
        "Panel: " + ", ".join(p["name"] for p in PANEL) + "; least of "
        f"{args.repeats} runs of {args.items:,} items per kind and size."
    )


if __name__ == "__main__":
    main()
