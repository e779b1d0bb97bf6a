"""Every MISTAKE_LEDGER_* name the deploy files tell an operator to set is a real setting."""

from __future__ import annotations

import re

from service.settings import ENV_PREFIX, Settings
from tests.deploy.tools import DEPLOY

NAME = re.compile(re.escape(ENV_PREFIX) + r"[A-Z0-9_]+")


# STYLE.md (Configuration): one typed settings object read from prefixed environment variables.
def test_environment_names_in_deploy_files_are_settings() -> None:
    fields = {ENV_PREFIX + name.upper() for name in Settings.model_fields}
    used: dict[str, set[str]] = {}
    for path in sorted(DEPLOY.rglob("*")):
        if path.is_file():
            for name in NAME.findall(path.read_text()):
                used.setdefault(name, set()).add(str(path.relative_to(DEPLOY)))
    unknown = {name: files for name, files in used.items() if name not in fields}
    assert not unknown, f"not settings of service.settings.Settings: {unknown}"
    # The token settings the container and the unit rely on are among them (DESIGN.md, Security).
    assert {
        ENV_PREFIX + "ADMIN_TOKEN",
        ENV_PREFIX + "STREAM_TOKENS",
        ENV_PREFIX + "METRICS_TOKEN",
    } <= set(used)


def test_documented_token_example_is_accepted_by_settings() -> None:
    # The stream-token example in deploy/README.md, fed to the real settings parser.
    readme = (DEPLOY / "README.md").read_text()
    match = re.search(r"^" + ENV_PREFIX + r"STREAM_TOKENS=(\{.*\})$", readme, re.MULTILINE)
    assert match, "deploy/README.md shows no MISTAKE_LEDGER_STREAM_TOKENS example line"
    settings = Settings.from_env({ENV_PREFIX + "STREAM_TOKENS": match.group(1)})
    assert settings.secured
    assert all(scopes for scopes in settings.stream_tokens.values())
