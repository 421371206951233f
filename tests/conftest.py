"""Shared test fixtures and the suite's own guards."""

from __future__ import annotations

import os

import pytest


def pytest_terminal_summary(terminalreporter: pytest.TerminalReporter, exitstatus: int) -> None:
    """In CI a skipped test is a hidden failure: say so loudly (see pytest_sessionfinish)."""
    skipped = terminalreporter.stats.get("skipped", [])
    if os.environ.get("CI") and skipped:
        terminalreporter.write_line(
            f"CI: {len(skipped)} test(s) skipped; every test must run in CI", red=True
        )


def pytest_sessionfinish(session: pytest.Session, exitstatus: int) -> None:
    """Fail a CI run that skipped tests, so a missing service cannot pass silently."""
    reporter = session.config.pluginmanager.get_plugin("terminalreporter")
    if reporter is None:
        return
    if os.environ.get("CI") and reporter.stats.get("skipped") and exitstatus == 0:
        session.exitstatus = pytest.ExitCode.TESTS_FAILED
