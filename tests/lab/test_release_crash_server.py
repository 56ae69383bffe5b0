"""tests/test_release_crash.py's SIGKILL-at-every-publishing-step test against the tracking server CI starts
(PostgreSQL backend, proxied artifact store): the same checks, through the server's API only."""

from __future__ import annotations

import pytest
from labkit import tracking_server
from test_release_crash import kill_at_every_step, train_small

pytestmark = [pytest.mark.lab, pytest.mark.slow]


def test_sigkill_at_every_step_on_the_tracking_server(tmp_path):
    uri = tracking_server()
    kill_at_every_step(tmp_path, uri, train_small(tmp_path, uri))
