"""Moving a stream: the size of its exported document, and the time and memory to export, check
and import it.

Run: ``python -m benchmarks.transfer [--ids 100000]``. In one process, without HTTP: a stream with
the six-learner panel of ``benchmarks.service`` gets ``--ids`` predictions on an open flag space,
half of them labelled (the rest left waiting), so the document carries that many ids; then it is
exported (``service.transfer.export_document``), checked (``read_document``) and adopted by a
second registry on its own store (what ``POST /v1/streams/import`` does after reading the body).
It prints figures and asserts nothing.
"""

from __future__ import annotations

import argparse
import random
import tempfile
import time
import tracemalloc
from pathlib import Path

from service.registry import Registry, committed
from service.schemas import StreamCreate
from service.settings import Settings
from service.store import Store
from service.transfer import export_document, read_document

PANEL = [
    {"name": "elim", "kind": "elimination", "negations": True},
    {"name": "perc", "kind": "perceptron", "margin": 0.25},
    {"name": "win", "kind": "winnow", "relevant": 3},
    {"name": "wm", "kind": "weighted-majority"},
    {"name": "pa", "kind": "passive-aggressive"},
    {"name": "avg", "kind": "perceptron", "variant": "averaged"},
]


def registry(directory: Path) -> Registry:
    settings = Settings.from_env({}, data_dir=directory, durability="normal")
    store = Store(directory, durability="normal")
    found = Registry(settings, store, time.time)
    found.open()
    return found


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--ids", type=int, default=100_000, help="predictions in the stream")
    ids = parser.parse_args().ids
    rng = random.Random(1)
    flags = [f"flag_{i}" for i in range(200)]
    with tempfile.TemporaryDirectory() as tmp:
        source = registry(Path(tmp) / "source")
        spec = StreamCreate.model_validate(
            {"stream": "bench", "features": 1000, "learners": PANEL, "label_wait_seconds": 1e6}
        )
        _, future = source.create(spec)
        committed(future)
        for start in range(0, ids, 1000):
            batch = [
                (f"item-{i}", rng.sample(flags, 8)) for i in range(start, min(ids, start + 1000))
            ]
            _, future = source.predict("bench", batch, batch=True)
            labels = [(item_id, rng.randint(0, 1)) for item_id, _ in batch[::2]]
            _, future = source.feedback("bench", labels, batch=True)
        committed(future)

        began = time.perf_counter()
        body, future = export_document(source, "bench")
        committed(future)
        exported = time.perf_counter() - began

        target = registry(Path(tmp) / "target")
        began = time.perf_counter()
        stream = read_document(target, body, "bench")
        checked = time.perf_counter() - began
        tracemalloc.start()  # a second check, for its memory (tracing slows it down)
        read_document(target, body, "bench")
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        began = time.perf_counter()
        _, future = target.adopt(stream)
        committed(future)
        adopted = time.perf_counter() - began
        same = target.ledger("bench") == source.ledger("bench")
        source.close()
        target.close()

    print(f"stream with {ids} ids ({ids // 2} waiting for labels), 6 learners")
    print(f"document: {len(body) / 1e6:.1f} MB, {len(body) / ids:.0f} bytes per id")
    print(f"export (state written out, committed): {exported:.2f} s")
    print(f"import check (parse, validate, restore): {checked:.2f} s, {peak / 1e6:.0f} MB at most")
    print(f"import store (event + snapshot committed): {adopted:.2f} s")
    print(f"ledger equal after the move: {same}")


if __name__ == "__main__":
    main()
