"""An unreachable tracking server gives a clear, quick error naming the URI."""

from __future__ import annotations

import socket

import pytest

from skymoments.tracking import (
    TrackedRun,
    TrackingUnavailableError,
    find_runs,
    settings_from,
    tracked_run,
)


@pytest.fixture
def closed_port_uri(monkeypatch):
    """``http://127.0.0.1:<port>`` where nothing listens, and MLflow's HTTP retries off."""
    # MLflow reads these per request: no retries, 2 s per request (defaults 7 and 120 s).
    monkeypatch.setenv("MLFLOW_HTTP_REQUEST_MAX_RETRIES", "0")
    monkeypatch.setenv("MLFLOW_HTTP_REQUEST_TIMEOUT", "2")
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    # The socket is closed again: connections to the port are refused.
    return f"http://127.0.0.1:{port}"


def test_unreachable_server_fails_before_the_run_with_the_uri(closed_port_uri):
    cfg = {"tracking": {"kind": "server", "uri": closed_port_uri, "experiment": "team"}}
    entered = False
    with pytest.raises(TrackingUnavailableError) as info:
        with tracked_run(cfg):
            entered = True
    assert not entered  # no work starts against a store that is not there
    message = str(info.value)
    assert closed_port_uri in message
    assert "mlflow server" in message and "tracking.uri" in message


def test_reading_runs_from_an_unreachable_server_is_the_same_clear_error(closed_port_uri):
    with pytest.raises(TrackingUnavailableError, match=closed_port_uri):
        find_runs(closed_port_uri, experiment="team")


def test_server_lost_mid_run_raises_clearly_and_final_status_only_warns(
    closed_port_uri, monkeypatch
):
    # A run whose server went away after the start-up check (which is skipped from then on,
    # as in a real run): MLflow's own failing call is turned into the clear error, and the
    # final status update is best-effort, a warning not a crash.
    from skymoments.tracking import store

    monkeypatch.setattr(store, "_PREPARED", {closed_port_uri})
    settings = settings_from({"kind": "server", "uri": closed_port_uri, "experiment": "team"})
    run = TrackedRun(settings, "0" * 32, "1")
    with pytest.raises(TrackingUnavailableError, match="while trying to log metrics") as info:
        run.log_metrics({"train/loss_mean": 1.0})
    assert closed_port_uri in str(info.value)
    with pytest.warns(
        RuntimeWarning, match=f"could not mark MLflow run 0+ FAILED in {closed_port_uri}"
    ):
        run._finish("FAILED")
