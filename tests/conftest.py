"""Shared test fixtures.

Prefect settings are set before anything imports Prefect: no telemetry (the machine is
offline), a generous start-up timeout for the temporary server on a busy 2-core machine, and an
in-memory database that avoids stalls while the server writes its event backlog
(see shared/prefect-notes.md).
"""

from __future__ import annotations

import os
import tempfile

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")
os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="winnow-prefect-home-"))
os.environ.setdefault(
    "PREFECT_API_DATABASE_CONNECTION_URL",
    "sqlite+aiosqlite:///file::memory:?cache=shared&uri=true&check_same_thread=false",
)
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")

import pytest  # noqa: E402


@pytest.fixture(scope="session")
def prefect_harness():
    """One Prefect test server for the whole session (starting one costs about 14 s).

    Request this fixture only in tests that run flows or tasks through the engine; tests of
    the plain functions call them directly.
    """
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        yield
