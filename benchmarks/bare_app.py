"""The floor for the service benchmark: a bare FastAPI app that parses a predict body and answers
a constant.

It validates the body with the service's own request model (``schemas.PredictRequest``: the same
JSON parsing and the same checks of ids and features) and returns an answer of the service's
shape without any stream, learner or store behind it. ``benchmarks.service`` runs it with uvicorn
exactly as it runs the service (one process, loopback) to measure what HTTP + FastAPI + pydantic
alone cost per call.
"""

from __future__ import annotations

from fastapi import FastAPI
from fastapi.responses import JSONResponse

from service.schemas import PredictRequest

ANSWER = {
    "id": "constant",
    "label": 0,
    "served_by": "elim",
    "votes": {"elim": 0, "elim-neg": 0, "perc": 0, "winnow": 0, "wm": 0, "pa": 0},
    "duplicate": False,
}

app = FastAPI(title="bare predict endpoint")


@app.post("/v1/streams/{stream}/predict")
async def predict(stream: str, body: PredictRequest) -> JSONResponse:
    return JSONResponse(ANSWER)


@app.get("/healthz")
async def healthz() -> dict[str, str]:
    return {"status": "alive"}
