"""deploy/container/Containerfile: read instruction by instruction (Docker's Dockerfile reference).

No container engine runs here, so the image is not built; these checks hold the file to the
project it packages: every package pyproject.toml ships is copied, the command line is the one
the CLI accepts, the user is not root, the data directory is a volume, no token is baked in.
"""

from __future__ import annotations

import json
import os
import re
import tomllib
from pathlib import Path

import pytest

from tests.deploy.tools import DEPLOY, ROOT

CONTAINERFILE = DEPLOY / "container" / "Containerfile"


def instructions(text: str) -> list[tuple[str, str]]:
    """(INSTRUCTION, arguments) pairs; comments dropped, backslash continuations joined."""
    result: list[tuple[str, str]] = []
    pending = ""
    for raw in text.splitlines():
        line = raw.strip()
        if not pending and (not line or line.startswith("#")):
            continue
        if line.endswith("\\"):
            pending += line[:-1] + " "
            continue
        line = pending + line
        pending = ""
        word, _, rest = line.partition(" ")
        result.append((word.upper(), rest.strip()))
    assert not pending, "the file ends inside a continued line"
    return result


@pytest.fixture(scope="module")
def steps() -> list[tuple[str, str]]:
    return instructions(CONTAINERFILE.read_text())


def args_of(steps: list[tuple[str, str]], word: str) -> list[str]:
    return [rest for w, rest in steps if w == word]


def command_line(steps: list[tuple[str, str]]) -> list[str]:
    (entrypoint,) = args_of(steps, "ENTRYPOINT")
    (cmd,) = args_of(steps, "CMD")
    # Exec (JSON) form, so that the server gets signals directly rather than through a shell.
    return list(json.loads(entrypoint)) + list(json.loads(cmd))


def test_base_image_and_install(steps: list[tuple[str, str]]) -> None:
    assert steps[0] == ("FROM", "python:3.11-slim")
    assert any(w == "RUN" and re.search(r"\bpip install \.(\s|$)", r) for w, r in steps)


def test_copies_everything_the_package_build_needs(steps: list[tuple[str, str]]) -> None:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())
    needed = {
        "pyproject.toml",
        project["project"]["readme"],
        *project["tool"]["setuptools"]["packages"],
    }
    copied: set[str] = set()
    for rest in args_of(steps, "COPY"):
        sources = rest.split()[:-1]
        for source in sources:
            assert (ROOT / source).exists(), f"COPY source {source} is not in the repository"
            copied.add(source.rstrip("/"))
    assert needed <= copied, f"not copied into the build: {needed - copied}"


def test_runs_as_a_non_root_user_with_the_data_dir_as_volume(
    steps: list[tuple[str, str]],
) -> None:
    users = args_of(steps, "USER")
    assert users, "no USER: the container would run as root"
    user = users[-1].split(":")[0]
    assert user not in {"root", "0"}
    args = command_line(steps)
    data_dir = args[args.index("--data-dir") + 1]
    (volume,) = args_of(steps, "VOLUME")
    assert data_dir in json.loads(volume)


def test_listens_on_all_interfaces_with_a_healthcheck_on_its_port(
    steps: list[tuple[str, str]],
) -> None:
    args = command_line(steps)
    assert args[:2] == ["mistake-ledger", "serve"]
    assert args[args.index("--host") + 1] == "0.0.0.0"
    port = args[args.index("--port") + 1]
    assert args_of(steps, "EXPOSE") == [port]
    (health,) = args_of(steps, "HEALTHCHECK")
    assert f"http://127.0.0.1:{port}/healthz" in health


def test_no_token_is_baked_into_the_image(steps: list[tuple[str, str]]) -> None:
    # Listening on 0.0.0.0 needs tokens; they must come at run time (--env-file), never in a layer.
    for word in ("ENV", "ARG", "LABEL"):
        for rest in args_of(steps, word):
            assert "TOKEN" not in rest.upper(), f"{word} {rest}"


def test_the_cli_accepts_the_command_line(steps: list[tuple[str, str]]) -> None:
    cli = pytest.importorskip("service.cli", reason="service.cli is not written yet")
    group = cli.main
    args = command_line(steps)[1:]
    ctx = group.make_context("mistake-ledger", list(args))
    serve = group.get_command(ctx, args[0])
    assert serve is not None, "mistake-ledger has no serve command"
    sub = serve.make_context(args[0], list(args[1:]), parent=ctx)
    assert sub.params["host"] == "0.0.0.0"
    assert Path(sub.params["data_dir"]) == Path("/var/lib/mistake-ledger")


def test_the_image_command_refuses_to_start_without_tokens(
    steps: list[tuple[str, str]], tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # deploy/README.md says so: the image listens on 0.0.0.0, which needs tokens.
    cli = pytest.importorskip("service.cli", reason="service.cli is not written yet")
    import uvicorn
    from click.testing import CliRunner

    def no_server(*args: object, **kwargs: object) -> None:
        raise AssertionError("serve went on to start a server on 0.0.0.0 without tokens")

    monkeypatch.setattr(uvicorn, "run", no_server)  # never bind a real port here

    args = command_line(steps)[1:]
    args[args.index("--data-dir") + 1] = str(tmp_path)
    clean = {name: None for name in os.environ if name.startswith("MISTAKE_LEDGER_")}
    result = CliRunner().invoke(cli.main, args, env=clean)
    assert result.exit_code == 2, result.output
    assert "0.0.0.0" in result.output
