"""Shared fixtures. Prefect runs against a throw-away local API, started once per session."""

import os

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")

import pytest  # noqa: E402


@pytest.fixture(scope="session")
def prefect_api():
    """Prefect's test harness: a temporary database and API for the whole test session.

    Yields the API's URL, for subprocesses (``PREFECT_API_URL``) that should use the same API.
    """
    from prefect.settings import PREFECT_API_URL
    from prefect.testing.utilities import prefect_test_harness

    # the server can take well over Prefect's default 30 s to start on a busy 2-core machine
    with prefect_test_harness(server_startup_timeout=180):
        yield PREFECT_API_URL.value()
