"""The ``mistake-ledger`` command: ``serve`` here; other modules add their commands to ``main``."""

from __future__ import annotations

import gc
import logging
from pathlib import Path
from typing import Any

import click

from service.security import is_loopback
from service.settings import Settings


@click.group()
@click.version_option(package_name="mistake-ledger")
def main() -> None:
    """Online learners per stream with a live ledger of mistakes against their ceilings."""


@main.command()
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on.")
@click.option("--port", default=8000, show_default=True, type=click.IntRange(1, 65535))
@click.option(
    "--data-dir",
    type=click.Path(file_okay=False, path_type=Path),
    default=None,
    help="Directory of the SQLite store (default: MISTAKE_LEDGER_DATA_DIR or ./data).",
)
@click.option(
    "--durability",
    type=click.Choice(["full", "normal"]),
    default=None,
    help="full: a write survives power loss (default); normal: it survives a crash.",
)
@click.option("--log-level", default="info", show_default=True)
def serve(
    host: str, port: int, data_dir: Path | None, durability: str | None, log_level: str
) -> None:
    """Run the HTTP service (one process, one worker)."""
    import uvicorn

    from service.app import create_app

    overrides: dict[str, Any] = {}
    if data_dir is not None:
        overrides["data_dir"] = data_dir
    if durability is not None:
        overrides["durability"] = durability
    settings = Settings.from_env(**overrides)
    if not settings.secured and not is_loopback(host):
        raise click.UsageError(
            f"Refusing to listen on {host}: no token is configured, so anyone who can reach "
            "that address could use the service. Set MISTAKE_LEDGER_ADMIN_TOKEN (and stream "
            "tokens) or listen on 127.0.0.1."
        )
    logging.basicConfig(level=log_level.upper(), format="%(asctime)s %(name)s %(message)s")
    # A process-wide setting, so the entry point makes it (not create_app). Every request makes
    # thousands of short-lived containers; at Python's default, the collector then runs every
    # few requests and its older generations rescan the streams' state as it grows.
    # benchmarks/service.py prints the collections (python_gc_collections_total) it costs.
    gc.set_threshold(settings.gc_young_threshold, *gc.get_threshold()[1:])
    app = create_app(settings)
    uvicorn.run(app, host=host, port=port, workers=1, log_level=log_level, lifespan="on")


# -- the tools around the service: replay a file, print a ledger, run the demo -----------------
from service.demo import demo_command  # noqa: E402
from service.replay import ledger_command, replay_command  # noqa: E402

main.add_command(replay_command)
main.add_command(ledger_command)
main.add_command(demo_command)


# -- moving a stream between shards: export it from one, import it into another -----------------


def _transfer_options(command: Any) -> Any:
    command = click.option(
        "--timeout", default=120.0, show_default=True, help="Seconds to wait for the answer."
    )(command)
    command = click.option(
        "--token",
        default=None,
        envvar="MISTAKE_LEDGER_TOKEN",
        help="The admin token of that service; env MISTAKE_LEDGER_TOKEN.",
    )(command)
    return click.option(
        "--url",
        default="http://127.0.0.1:8000",
        show_default=True,
        envvar="MISTAKE_LEDGER_URL",
        help="Address of the service (a shard's own address, or the proxy).",
    )(command)


@main.command("export")
@click.argument("stream")
@_transfer_options
def export_command(stream: str, url: str, token: str | None, timeout: float) -> None:
    """Write STREAM's whole state (learners, ledger, waiting predictions) as JSON to stdout.

    A summary goes to stderr: two exports with the same seq hold the same writes.
    """
    import json

    from service.client import ClientError, LedgerClient

    try:
        with LedgerClient(url, token, timeout=timeout, retries=2) as client:
            document = client.export_stream(stream)
    except ClientError as error:
        raise click.ClickException(str(error)) from None
    click.echo(json.dumps(document, separators=(",", ":"), allow_nan=False))
    click.echo(_transfer_summary("exported", document), err=True)


@main.command("import")
@click.argument("file", type=click.File("r", encoding="utf-8"))
@_transfer_options
def import_command(file: Any, url: str, token: str | None, timeout: float) -> None:
    """Create a stream on the service at --url from FILE, written by export ("-": stdin)."""
    import json

    from service.client import ClientError, LedgerClient

    try:
        document = json.load(file)
    except (ValueError, UnicodeDecodeError) as error:
        raise click.ClickException(f"{file.name} is not a JSON document: {error}") from None
    if not isinstance(document, dict):
        raise click.ClickException(f"{file.name} holds no exported stream (not a JSON object).")
    try:
        with LedgerClient(url, token, timeout=timeout, retries=2) as client:
            client.import_stream(document)
    except ClientError as error:
        raise click.ClickException(str(error)) from None
    click.echo(_transfer_summary(f"imported into {url}:", document))


def _transfer_summary(what: str, document: dict[str, Any]) -> str:
    state = document.get("state") or {}
    return (
        f"{what} stream {document.get('stream')!r}: seq {document.get('seq')}, "
        f"{len(state.get('pending') or [])} waiting predictions, "
        f"{len(state.get('resolved') or [])} remembered ids."
    )


if __name__ == "__main__":
    main()
