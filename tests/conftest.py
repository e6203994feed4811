"""Shared fixtures. Prefect runs against a throw-away local API, started once per session."""

import os

os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")

import pytest  # noqa: E402


@pytest.fixture(scope="session")
def prefect_api():
    """Prefect's test harness: a temporary database and API for the whole test session."""
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness():
        yield
