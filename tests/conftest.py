"""Shared fixtures: quiet Prefect settings, one Prefect test harness per session, the example dossier."""

import os

from flows.cli import QUIET_PREFECT

for _key, _value in QUIET_PREFECT.items():
    os.environ.setdefault(_key, _value)

import pytest  # noqa: E402


@pytest.fixture(scope="session")
def prefect_harness():
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        yield


@pytest.fixture()
def dossier():
    from tests.dossiers import example_dossier

    return example_dossier()
