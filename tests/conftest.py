"""Shared test fixtures and the suite's own guards."""

from __future__ import annotations

import os

import pytest

# The kernels compiled ahead of time, every call's arguments checked against the compiled
# signature (livematch/core/_jit.py): a call with arrays of other types fails loudly here
# instead of reading them wrongly. Set before livematch is first imported. Subprocesses
# started with tests/services.subprocess_env() run unchecked, as a worker does.
os.environ.setdefault("LIVEMATCH_KERNELS", "checked")


def pytest_sessionstart(session: pytest.Session) -> None:
    """Refuse to test compiled modules built from other sources than the checkout's.

    A module compiled with mypyc (setup.py) is loaded instead of its ``.py``: after an
    edit, the tests would run the old code and pass or fail for the wrong reason.
    """
    from livematch.native import pure_process, stale

    old = [] if pure_process() else stale()
    if old:
        pytest.exit(f"compiled modules older than their sources: {', '.join(old)}; "
                    "rebuild with `.venv/bin/pip install -e .` (or scripts/build-native "
                    "in a checkout that is not the installed one)", returncode=2)


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    """Skip ``pure_python`` tests in a process that runs compiled modules (say why).

    They replace a function inside a compiled module or read what only Python objects
    have; compiled, the replacement is never called. ``scripts/test`` deselects them in
    its first session and runs them alone with ``LIVEMATCH_PURE_PYTHON=1``.
    """
    from livematch.native import compiled, pure_process

    if pure_process() or not compiled():
        return
    skip = pytest.mark.skip(reason="needs the modules from source: LIVEMATCH_PURE_PYTHON=1")
    for item in items:
        if item.get_closest_marker("pure_python") is not None:
            item.add_marker(skip)


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
