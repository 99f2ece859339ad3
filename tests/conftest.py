"""Shared test set-up: deterministic hypothesis runs and a CLI runner."""

from __future__ import annotations

import pytest
from hypothesis import HealthCheck, settings

# The same examples on every run (CI included): failures are reproducible.
settings.register_profile(
    "netbuild",
    derandomize=True,
    max_examples=60,
    deadline=None,
    suppress_health_check=[HealthCheck.too_slow],
)
settings.load_profile("netbuild")


@pytest.fixture
def runner():
    from click.testing import CliRunner

    return CliRunner()
