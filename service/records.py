"""Reading replay files: JSON lines or CSV, each item with its time, features and label.

JSON lines: one ``{"id", "at", "label_at", "features", "label"}`` object per line, ``features``
a list of flag names or a mapping of name to number. CSV: a header with ``id`` and ``at``, and
optionally ``label`` and ``label_at`` (or the column named as the label-time column); every
other column is a numeric feature (an empty cell means absent). Times are ISO 8601 (UTC when no
zone is given) or seconds since 1970; labels are 0, 1, true, false, or empty/null for a label
that never comes.

Every problem is a :class:`ReplayError` naming the file and line, the field, the rule and the value.
"""

from __future__ import annotations

import csv
import json
import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

RESERVED = ("id", "at", "label_at", "label")


class ReplayError(ValueError):
    """A replay input is wrong: names the place, the field, the rule and the value."""

    def __init__(self, message: str, *, field: str, rule: str, value: Any = None) -> None:
        super().__init__(message)
        self.field = field
        self.rule = rule
        self.value = value


@dataclass(frozen=True)
class Record:
    """One item of a replay file."""

    id: str
    at: float
    label_at: float | None
    features: list[str] | dict[str, float]
    label: int | None
    line: int


# -- reading files ------------------------------------------------------------------------------


def load_records(path: Path, label_column: str = "label_at") -> list[Record]:
    """Read a JSON-lines or CSV replay file; ``label_column`` holds the label times, if any."""
    if not path.is_file():
        raise ReplayError(
            f"Replay file {str(path)!r} does not exist.", field="file", rule="existing file"
        )
    suffix = path.suffix.lower()
    rows = _csv_rows(path, label_column) if suffix == ".csv" else _json_rows(path)
    records = [_record(path, line, row, label_column) for line, row in rows]
    if not records:
        raise ReplayError(
            f"Replay file {str(path)!r} has no items.", field="file", rule="at least one item"
        )
    seen: dict[str, int] = {}
    for record in records:
        if record.id in seen:
            raise ReplayError(
                f"{path.name}, line {record.line}: id {record.id!r} already used on line "
                f"{seen[record.id]}.",
                field="id",
                rule="unique in the file",
                value=record.id,
            )
        seen[record.id] = record.line
    return records


def _json_rows(path: Path) -> Iterator[tuple[int, dict[str, Any]]]:
    with path.open(encoding="utf-8") as handle:
        for line, text in enumerate(handle, start=1):
            if not text.strip():
                continue
            try:
                row = json.loads(text)
            except json.JSONDecodeError as error:
                raise ReplayError(
                    f"{path.name}, line {line}: not valid JSON ({error.msg}).",
                    field=f"line {line}",
                    rule="one JSON object per line",
                    value=text.strip()[:80],
                ) from None
            if not isinstance(row, dict):
                raise ReplayError(
                    f"{path.name}, line {line}: expected a JSON object; got {type(row).__name__}.",
                    field=f"line {line}",
                    rule="one JSON object per line",
                    value=text.strip()[:80],
                )
            yield line, row


def _csv_rows(path: Path, label_column: str) -> Iterator[tuple[int, dict[str, Any]]]:
    reserved = (*RESERVED, label_column)
    with path.open(encoding="utf-8", newline="") as handle:
        reader = csv.DictReader(handle)
        header = reader.fieldnames or []
        for name in ("id", "at"):
            if name not in header:
                raise ReplayError(
                    f"{path.name}: the CSV header has no {name!r} column.",
                    field=name,
                    rule="a column of the CSV header",
                    value=",".join(header),
                )
        for row in reader:
            line = reader.line_num
            features: dict[str, float] = {}
            for name in header:
                if name in reserved:
                    continue
                text = (row.get(name) or "").strip()
                if not text:
                    continue
                value = _finite(text)
                if value is None:
                    raise ReplayError(
                        f"{path.name}, line {line}: feature {name!r} must be a finite number; "
                        f"got {text!r}.",
                        field=f"features.{name}",
                        rule="finite number",
                        value=text,
                    )
                if value != 0:
                    features[name] = value
            out: dict[str, Any] = {k: row.get(k) for k in reserved if k in row}
            out["features"] = features
            yield line, out


def _finite(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value if math.isfinite(value) else None


def _record(path: Path, line: int, row: Mapping[str, Any], label_column: str) -> Record:
    where = f"{path.name}, line {line}"
    ident = row.get("id")
    if not isinstance(ident, str | int) or isinstance(ident, bool) or str(ident) == "":
        raise ReplayError(
            f"{where}: 'id' must be a non-empty string; got {ident!r}.",
            field="id",
            rule="non-empty string",
            value=ident,
        )
    at = parse_time(row.get("at"), where, "at")
    if at is None:
        raise ReplayError(
            f"{where}: 'at' is required.", field="at", rule="ISO 8601 time or seconds", value=None
        )
    features = row.get("features")
    if isinstance(features, list):
        if not all(isinstance(f, str) for f in features):
            raise ReplayError(
                f"{where}: 'features' as a list must hold flag names (strings).",
                field="features",
                rule="list of strings or mapping of name to number",
                value=str(features)[:80],
            )
    elif not isinstance(features, dict):
        raise ReplayError(
            f"{where}: 'features' must be a list of flag names or a mapping of name to number; "
            f"got {features!r}.",
            field="features",
            rule="list of strings or mapping of name to number",
            value=str(features)[:80],
        )
    label = _label(row.get("label"), where)
    label_at = parse_time(row.get(label_column), where, label_column)
    if label_at is not None and label_at < at:
        raise ReplayError(
            f"{where}: the label time {row.get(label_column)!r} is before the item's time "
            f"{row.get('at')!r}.",
            field=label_column,
            rule="not before 'at'",
            value=row.get(label_column),
        )
    return Record(str(ident), at, label_at, features, label, line)


def parse_time(value: Any, where: str, name: str) -> float | None:
    """Seconds since 1970 from an ISO 8601 string (UTC if no zone) or a number; None if empty."""
    if value is None or value == "":
        return None
    if isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value):
        return float(value)
    if isinstance(value, str):
        number = _finite(value)
        if number is not None:
            return number
        try:
            moment = datetime.fromisoformat(value.strip())
        except ValueError:
            pass
        else:
            if moment.tzinfo is None:
                moment = moment.replace(tzinfo=UTC)
            return moment.timestamp()
    raise ReplayError(
        f"{where}: {name!r} must be an ISO 8601 time or a number of seconds; got {value!r}.",
        field=name,
        rule="ISO 8601 time or seconds since 1970",
        value=value,
    )


def _label(value: Any, where: str) -> int | None:
    if value is None or value == "":
        return None
    if isinstance(value, bool):
        return int(value)
    if isinstance(value, int | float) and value in (0, 1):
        return int(value)
    if isinstance(value, str) and value.strip().lower() in ("0", "1", "true", "false"):
        return int(value.strip().lower() in ("1", "true"))
    raise ReplayError(
        f"{where}: 'label' must be 0, 1, true, false or empty; got {value!r}.",
        field="label",
        rule="one of 0, 1, true, false, empty",
        value=value,
    )
