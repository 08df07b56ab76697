"""Shared test set-up: GUI tests may skip on a developer machine without a display, never in CI."""

import os

import pytest


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    if not os.environ.get("CI"):
        return
    skipped = terminalreporter.stats.get("skipped", [])
    if skipped:
        terminalreporter.write_line(f"CI: {len(skipped)} test(s) skipped; in CI every test must run.", red=True)


def pytest_sessionfinish(session, exitstatus):
    if os.environ.get("CI") and session.config.pluginmanager.get_plugin("terminalreporter"):
        reporter = session.config.pluginmanager.get_plugin("terminalreporter")
        if reporter.stats.get("skipped") and session.exitstatus == 0:
            session.exitstatus = pytest.ExitCode.TESTS_FAILED
