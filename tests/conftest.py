"""The plugins of every test layer: the CI guard (``tests/ci.py``) and the shared fixtures
(``tests/support/fixtures.py``: brokers, MQTT names, PostgreSQL, services, synthetic data)."""

from __future__ import annotations

# Under CI a skip fails; outside CI skips are listed loudly at the end (tests/ci.py).
pytest_plugins = ["tests.ci", "tests.support.fixtures"]
