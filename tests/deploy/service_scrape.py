"""Drive a real service in process into known states and take what a Prometheus scrape would get.

Two streams, no tokens, a fresh data directory:

- ``lockers-north``: ``elim`` (monotone elimination over flags a, b) and ``perc`` (a perceptron
  without a declared margin, so it claims no ceiling). One item with both flags on is labelled 0:
  elimination starts from the conjunction of all flags, says 1, and a false positive is direct
  proof that the stream is not a monotone conjunction (THEORY.md, Valiant 1984): contradicted.
- ``parcels-east``: ``winnow`` (Winnow2, alpha 2, theta = n = 2, declared k = 1 relevant flag).
  Its ceiling is 2 + 3 k (1 + log2 n) = 8 (Littlestone 1988; THEORY.md). Every label is the
  opposite of its answer, so each one is a mistake; after 9 it is past the ceiling: exceeded.
"""

from __future__ import annotations

import asyncio
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
from prometheus_client.parser import text_string_to_metric_families

from service.app import create_app
from service.settings import Settings

WINNOW_ROUNDS = 9


@dataclass(frozen=True)
class Sample:
    name: str
    labels: dict[str, str]
    value: float


@dataclass(frozen=True)
class Scrape:
    samples: list[Sample]
    ledgers: dict[str, dict[str, Any]]

    def series(self) -> dict[str, set[str]]:
        """Series name -> every label name it carries."""
        found: dict[str, set[str]] = {}
        for sample in self.samples:
            found.setdefault(sample.name, set()).update(sample.labels)
        return found

    def values(self, name: str, **labels: str) -> list[float]:
        return [
            s.value
            for s in self.samples
            if s.name == name and all(s.labels.get(k) == v for k, v in labels.items())
        ]


async def _drive(app: Any) -> tuple[str, dict[str, dict[str, Any]]]:
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://127.0.0.1") as c:

            async def ok(method: str, path: str, body: Any = None) -> dict[str, Any]:
                response = await c.request(method, path, json=body)
                assert response.status_code in (200, 201), (path, response.text)
                data: dict[str, Any] = response.json()
                return data

            await ok(
                "POST",
                "/v1/streams",
                {
                    "stream": "lockers-north",
                    "features": ["a", "b"],
                    "learners": [
                        {"name": "elim", "kind": "elimination"},
                        {"name": "perc", "kind": "perceptron"},
                    ],
                },
            )
            await ok(
                "POST", "/v1/streams/lockers-north/predict", {"id": "n1", "features": ["a", "b"]}
            )
            await ok("POST", "/v1/streams/lockers-north/feedback", {"id": "n1", "label": 0})

            await ok(
                "POST",
                "/v1/streams",
                {
                    "stream": "parcels-east",
                    "features": ["a", "b"],
                    "learners": [{"name": "winnow", "kind": "winnow", "relevant": 1}],
                },
            )
            for i in range(WINNOW_ROUNDS):
                answer = await ok(
                    "POST", "/v1/streams/parcels-east/predict", {"id": f"e{i}", "features": ["a"]}
                )
                wrong = 1 - int(answer["votes"]["winnow"])
                await ok(
                    "POST", "/v1/streams/parcels-east/feedback", {"id": f"e{i}", "label": wrong}
                )

            ledgers = {
                name: await ok("GET", f"/v1/streams/{name}/ledger")
                for name in ("lockers-north", "parcels-east")
            }
            metrics = await c.get("/metrics")
            assert metrics.status_code == 200, metrics.text
            return metrics.text, ledgers


def scrape_service(data_dir: Path, *, stream_label: bool = True) -> Scrape:
    settings = Settings.from_env({}, data_dir=data_dir, metrics_stream_label=stream_label)
    text, ledgers = asyncio.run(_drive(create_app(settings)))
    samples = [
        Sample(sample.name, dict(sample.labels), float(sample.value))
        for family in text_string_to_metric_families(text)
        for sample in family.samples
    ]
    return Scrape(samples, ledgers)
