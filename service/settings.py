"""One typed settings object, read from ``MISTAKE_LEDGER_*`` environment variables.

Every field can be set by an environment variable named after it with the prefix, e.g.
``MISTAKE_LEDGER_DATA_DIR=/var/lib/mistake-ledger`` or
``MISTAKE_LEDGER_STREAM_TOKENS='{"<token>": ["lockers-*"]}'`` (mappings and lists are JSON).
Tests pass their own environment to :meth:`Settings.from_env` instead of touching ``os.environ``.

Tokens (``admin_token``, the keys of ``stream_tokens``, ``metrics_token``) must be at least 16
characters; without any token the service answers everyone but listens on loopback only.
"""

from __future__ import annotations

import contextvars
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Literal

from pydantic import Field, SecretStr, field_validator
from pydantic_settings import (
    BaseSettings,
    EnvSettingsSource,
    PydanticBaseSettingsSource,
    SettingsConfigDict,
)

ENV_PREFIX = "MISTAKE_LEDGER_"
MIN_TOKEN_LENGTH = 16

_injected: contextvars.ContextVar[Mapping[str, str] | None] = contextvars.ContextVar(
    "mistake_ledger_env", default=None
)


class _MappingEnvSource(EnvSettingsSource):
    """The environment source, reading a given mapping instead of ``os.environ``."""

    def __init__(self, settings_cls: type[BaseSettings], env: Mapping[str, str]) -> None:
        self._mapping = env
        super().__init__(settings_cls)

    def _load_env_vars(self) -> Mapping[str, str | None]:
        return {key.lower(): value for key, value in self._mapping.items() if value != ""}


class Settings(BaseSettings):
    """Everything an operator can configure; defaults suit one process on one machine."""

    model_config = SettingsConfigDict(env_prefix=ENV_PREFIX, extra="ignore", frozen=True)

    # storage
    data_dir: Path = Field(Path("data"), description="directory of the SQLite store")
    durability: Literal["full", "normal"] = Field(
        "full",
        description="SQLite synchronous mode: full survives power loss, normal only a crash",
    )
    group_commit_max_events: int = Field(1000, ge=1, description="most events in one commit")
    group_commit_max_wait_seconds: float = Field(
        0.002,
        ge=0,
        description="while more write requests keep starting in each turn of the event loop, "
        "their commit waits for them, at most this long; a lone request never waits (0: commit "
        "after each turn)",
    )
    snapshot_every_events: int = Field(5000, ge=1, description="events per stream per snapshot")
    snapshot_every_items: int = Field(
        100_000, ge=1, description="items per stream per snapshot (whichever comes first)"
    )
    snapshot_size_ratio: float = Field(
        2.0,
        ge=0,
        description="a snapshot also waits until the items logged since the last one reach this "
        "many times the ids it holds (waiting predictions and remembered ids); 0: never waits",
    )
    snapshot_interval_seconds: float = Field(300.0, gt=0, description="snapshot a changed stream")
    sweep_interval_seconds: float = Field(30.0, gt=0, description="expire waiting predictions")
    gc_young_threshold: int = Field(
        50_000,
        ge=0,
        description="`serve` only: Python's gc threshold0 for the process, the net allocations "
        "between collections of young objects (Python's default is 700; 0 stops automatic "
        "collection)",
    )

    # security
    admin_token: SecretStr | None = Field(None, description="token that manages streams")
    stream_tokens: dict[str, list[str]] = Field(
        default_factory=dict,
        repr=False,
        description="token -> stream ids or glob patterns it may use",
    )
    metrics_token: SecretStr | None = Field(None, description="token that may read /metrics")

    # limits
    max_body_bytes: int = Field(1_048_576, ge=64)
    max_import_bytes: int = Field(
        256 * 1_048_576, ge=64, description="largest stream document POST /v1/streams/import takes"
    )
    max_batch_items: int = Field(1000, ge=1)
    max_features_per_item: int = Field(10_000, ge=1)
    max_streams: int = Field(1000, ge=1)
    max_learners: int = Field(16, ge=1)
    max_remembered_ids: int = Field(
        1_000_000, ge=1, description="labelled or expired ids kept per stream for idempotency"
    )
    history_points: int = Field(200, ge=8, description="points kept in a learner's history")

    # metrics
    metrics_stream_label: bool = Field(
        True, description="label metrics by stream; off: one series per learner name"
    )

    # alerts
    webhook_allow: list[str] = Field(
        default_factory=list, description="URL prefixes a stream's webhook may start with"
    )
    webhook_timeout_seconds: float = Field(5.0, gt=0)
    webhook_retries: int = Field(3, ge=0)
    webhook_backoff_seconds: float = Field(0.5, ge=0)

    @field_validator("admin_token", "metrics_token")
    @classmethod
    def _long_secret(cls, value: SecretStr | None) -> SecretStr | None:
        if value is not None and len(value.get_secret_value()) < MIN_TOKEN_LENGTH:
            raise ValueError(f"a token must have at least {MIN_TOKEN_LENGTH} characters")
        return value

    @field_validator("stream_tokens")
    @classmethod
    def _long_stream_tokens(cls, value: dict[str, list[str]]) -> dict[str, list[str]]:
        for token, scopes in value.items():
            if len(token) < MIN_TOKEN_LENGTH:
                raise ValueError(f"a token must have at least {MIN_TOKEN_LENGTH} characters")
            if not scopes:
                raise ValueError("a stream token needs at least one stream id or pattern")
        return value

    @classmethod
    def settings_customise_sources(
        cls,
        settings_cls: type[BaseSettings],
        init_settings: PydanticBaseSettingsSource,
        env_settings: PydanticBaseSettingsSource,
        dotenv_settings: PydanticBaseSettingsSource,
        file_secret_settings: PydanticBaseSettingsSource,
    ) -> tuple[PydanticBaseSettingsSource, ...]:
        env = _injected.get()
        if env is not None:
            env_settings = _MappingEnvSource(settings_cls, env)
        return (init_settings, env_settings)

    @classmethod
    def from_env(cls, env: Mapping[str, str] | None = None, **overrides: Any) -> Settings:
        """Settings from ``env`` (default: the process environment); ``overrides`` win."""
        token = _injected.set(dict(os.environ) if env is None else dict(env))
        try:
            return cls(**overrides)
        finally:
            _injected.reset(token)

    @property
    def secured(self) -> bool:
        """True when any token is configured (the service may then listen beyond loopback)."""
        return self.admin_token is not None or bool(self.stream_tokens)
