"""Test configuration.

Prefect is kept away from the network and from a temporary server: before Prefect is
imported anywhere we point PREFECT_HOME at a temporary folder and switch the ephemeral
server off, so an accidental orchestrated call fails fast instead of starting a server.
Tests of flows use the session-wide ``prefect_server`` fixture.
"""
from __future__ import annotations

import os
import tempfile

os.environ.setdefault("PREFECT_HOME", tempfile.mkdtemp(prefix="towerflow-prefect-"))
os.environ["PREFECT_SERVER_EPHEMERAL_ENABLED"] = "false"
os.environ["PREFECT_SERVER_ANALYTICS_ENABLED"] = "false"
os.environ["DO_NOT_TRACK"] = "1"
os.environ.pop("PREFECT_API_URL", None)
os.environ.setdefault("MPLBACKEND", "Agg")

import pytest  # noqa: E402


@pytest.fixture(scope="session")
def prefect_server():
    """One Prefect test server for the whole session (13–20 s to start here).

    The harness gives up after 30 s by default; on a busy 2-core machine the server's
    database migrations can take longer, so it may wait up to 120 s.
    """
    from prefect.testing.utilities import prefect_test_harness

    with prefect_test_harness(server_startup_timeout=120):
        yield
