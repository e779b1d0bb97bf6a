"""The external-tool guard: skip without the tool on a developer machine, fail in CI."""

from __future__ import annotations

import pytest

from tests.deploy.tools import require_tool

MISSING = "mistake-ledger-no-such-program"


# CI=true is set by the common CI services (common practice, from memory); pytest.skip and
# pytest.fail raise their own exceptions (pytest documentation).
def test_missing_tool_skips_outside_ci(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("CI", raising=False)
    with pytest.raises(pytest.skip.Exception):
        require_tool(MISSING)


def test_missing_tool_fails_in_ci(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CI", "true")
    with pytest.raises(pytest.fail.Exception, match=MISSING):
        require_tool(MISSING)


def test_present_tool_is_found(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("CI", "true")
    assert require_tool("sh").endswith("/sh")  # POSIX systems ship /bin/sh: common practice
