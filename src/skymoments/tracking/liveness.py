"""A run tells the truth about how it ended: stop signals, and a heartbeat while alive.

Signals
-------
While :func:`skymoments.tracking.tracked_run` holds a run in the main thread, SIGTERM (what a
cluster scheduler sends on preemption or at its time limit, and what ``timeout`` sends) and
SIGINT (Ctrl-C) raise :class:`RunStopped` in the main thread, wherever it is (training,
synthesis, evaluation). ``tracked_run`` marks the run KILLED and re-raises; the command line
prints the exception's one line and exits ``128 + signal number`` (143 for SIGTERM, 130 for
SIGINT), the shell's convention for a process ended by a signal.

Lightning's ``Trainer.fit`` installs its own SIGTERM handler for the duration of a fit and
calls the handler that was there before it (ours) after its own, so the two compose: Lightning
notes the signal, ours raises. Lightning turns a ``KeyboardInterrupt`` into ``sys.exit(1)``;
``RunStopped`` is not a ``KeyboardInterrupt``, so it passes through Lightning unchanged.
``RunStopped`` derives from ``BaseException`` so that a sweep's ``except Exception`` does not
swallow it: a stopped sweep job stops the sweep, as the scheduler meant.

Heartbeat
---------
SIGKILL (out of memory, a lost node) cannot be caught, and the run would stay RUNNING. So a
daemon thread sets the tag ``skymoments.heartbeat`` (milliseconds since the epoch) every
``skymoments.heartbeat_s`` seconds while the run is open (``SKYMOMENTS_HEARTBEAT_S``, default
30). A RUNNING run whose last heartbeat is older than :data:`LOST_AFTER_BEATS` periods is
*lost*: its process is gone. ``skymoments compare`` shows such runs as ``LOST``, and
``skymoments settle`` lists them and, asked to, marks them KILLED.
"""

from __future__ import annotations

import contextlib
import logging
import os
import signal
import threading
import time
from collections.abc import Callable, Iterator, Mapping

__all__ = [
    "HEARTBEAT_PERIOD_TAG",
    "HEARTBEAT_TAG",
    "LOST_AFTER_BEATS",
    "Heartbeat",
    "RunStopped",
    "heartbeat_period_s",
    "last_heartbeat_s",
    "lost_for_s",
    "stop_received",
    "stop_signals",
]

log = logging.getLogger(__name__)

HEARTBEAT_TAG = "skymoments.heartbeat"
HEARTBEAT_PERIOD_TAG = "skymoments.heartbeat_s"
STOPPED_BY_TAG = "skymoments.stopped_by"
ENV_HEARTBEAT_S = "SKYMOMENTS_HEARTBEAT_S"
DEFAULT_HEARTBEAT_S = 30.0
# A run is lost after this many missed beats. Generous on purpose (common practice for
# failure detectors: several periods, not one): a store that is briefly locked or slow
# delays a beat without the run being dead.
LOST_AFTER_BEATS = 4
STOP_SIGNALS = ("SIGTERM", "SIGINT")


class RunStopped(BaseException):
    """The job was stopped by a signal (SIGTERM or SIGINT) while its run was open.

    Attributes
    ----------
    signum : int
    run_id, tracking_uri : str or None
        Filled in by ``tracked_run`` once it knows them.
    marked : bool or None
        Whether the run could be marked KILLED (None: not tried yet).
    """

    def __init__(self, signum: int) -> None:
        super().__init__(signum)
        self.signum = int(signum)
        self.run_id: str | None = None
        self.tracking_uri: str | None = None
        self.marked: bool | None = None

    @property
    def signal_name(self) -> str:
        try:
            return signal.Signals(self.signum).name
        except ValueError:
            return f"signal {self.signum}"

    @property
    def exit_code(self) -> int:
        """``128 + signum``: 143 for SIGTERM, 130 for SIGINT."""
        return 128 + self.signum

    def __str__(self) -> str:
        what = "interrupted" if self.signum == signal.SIGINT else f"stopped by {self.signal_name}"
        if self.run_id is None:
            return what
        if self.marked is False:
            return (
                f"{what}: could not mark run {self.run_id} KILLED in {self.tracking_uri}; "
                "`skymoments settle settle.mark=true` marks it once its heartbeat has stopped"
            )
        return f"{what}: run {self.run_id} is marked KILLED in {self.tracking_uri}"


# The first stop signal any guard of this process received (a sweep's parent run, closed
# at exit, is KILLED rather than FAILED when a job of it was stopped).
_received: list[int] = []


def stop_received() -> str | None:
    """The name of the stop signal a run of this process was stopped by, or None."""
    if not _received:
        return None
    try:
        return signal.Signals(_received[0]).name
    except ValueError:
        return f"signal {_received[0]}"


class _StopGuard:
    """Raise :class:`RunStopped` on the first stop signal; ignore later ones."""

    def __init__(self) -> None:
        self.received: int | None = None
        self.closing = False

    def handle(self, signum: int, frame) -> None:
        if self.received is not None or self.closing:
            # Already on the way out (marking the run): finish that first.
            log.warning("%s received while the run is being closed; ignored", signum)
            return
        self.received = int(signum)
        if not _received:
            _received.append(int(signum))
        raise RunStopped(signum)


@contextlib.contextmanager
def stop_signals() -> Iterator[_StopGuard | None]:
    """Turn SIGTERM and SIGINT into :class:`RunStopped` for a block (main thread only).

    Yields the guard (set ``guard.closing = True`` before cleanup that must not be cut
    short), or None outside the main thread, where Python cannot set signal handlers.
    Handlers that were there before are put back afterwards.
    """
    if threading.current_thread() is not threading.main_thread():
        yield None
        return
    guard = _StopGuard()
    previous = {}
    for name in STOP_SIGNALS:
        number = getattr(signal, name)
        previous[number] = signal.getsignal(number)
        signal.signal(number, guard.handle)
    try:
        yield guard
    finally:
        for number, handler in previous.items():
            signal.signal(number, handler if handler is not None else signal.SIG_DFL)


def heartbeat_period_s() -> float:
    """The heartbeat period: ``SKYMOMENTS_HEARTBEAT_S`` seconds (default 30).

    Raises
    ------
    ValueError
        The variable is not a positive number.
    """
    text = os.environ.get(ENV_HEARTBEAT_S)
    if text is None or not text.strip():
        return DEFAULT_HEARTBEAT_S
    try:
        value = float(text)
    except ValueError:
        value = float("nan")
    if not value > 0 or value == float("inf"):
        raise ValueError(
            f"{ENV_HEARTBEAT_S}={text!r} is not a positive number of seconds; unset it "
            f"(default {DEFAULT_HEARTBEAT_S:g}) or give e.g. {ENV_HEARTBEAT_S}=30"
        )
    return value


def now_ms() -> int:
    return int(time.time() * 1000)


class Heartbeat:
    """A daemon thread calling ``beat(now_ms)`` every ``period_s`` seconds until stopped.

    A failed beat (store locked past its retries, server away) is logged and the next one
    is tried on time: a missed beat is exactly what the heartbeat exists to show.
    """

    def __init__(self, beat: Callable[[int], None], period_s: float) -> None:
        self._beat = beat
        self.period_s = float(period_s)
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="skymoments-heartbeat", daemon=True)

    def start(self) -> Heartbeat:
        self._thread.start()
        return self

    def _loop(self) -> None:
        while not self._stop.wait(self.period_s):
            try:
                self._beat(now_ms())
            except Exception as exc:  # a missed beat is reported by its absence
                log.debug("heartbeat not recorded: %s", exc)

    def stop(self) -> None:
        """Stop the thread and wait for a beat in progress (so none lands after the end)."""
        self._stop.set()
        if self._thread.is_alive() and self._thread is not threading.current_thread():
            self._thread.join()


def last_heartbeat_s(tags: Mapping[str, str]) -> float | None:
    """The run's last heartbeat in seconds since the epoch, or None (a run without one)."""
    text = tags.get(HEARTBEAT_TAG)
    try:
        return float(text) / 1000.0 if text else None
    except ValueError:
        return None


def lost_for_s(
    status: str, tags: Mapping[str, str], now_s: float | None = None, lost_after_s=None
) -> float | None:
    """Seconds since a RUNNING run's heartbeat stopped, or None if it is not lost.

    Parameters
    ----------
    status : str
        The run's status: only a RUNNING run can be lost.
    tags : mapping
        The run's tags (``skymoments.heartbeat``, ``skymoments.heartbeat_s``).
    now_s : float, optional
        Seconds since the epoch (default: now).
    lost_after_s : float, optional
        Silence after which the run is lost; default :data:`LOST_AFTER_BEATS` times the
        period the run recorded.

    Returns
    -------
    float or None
        The age of its last heartbeat when it exceeds the threshold. A run with no heartbeat
        tag (tracked before runs had one) is never called lost: nothing says it died.
    """
    if status != "RUNNING":
        return None
    last = last_heartbeat_s(tags)
    if last is None:
        return None
    if lost_after_s is None:
        try:
            period = float(tags.get(HEARTBEAT_PERIOD_TAG) or DEFAULT_HEARTBEAT_S)
        except ValueError:
            period = DEFAULT_HEARTBEAT_S
        lost_after_s = LOST_AFTER_BEATS * period
    age = (time.time() if now_s is None else now_s) - last
    return age if age > float(lost_after_s) else None


def find_lost_runs(tracking, experiment: str | None = None, lost_after_s=None, now_s=None):
    """RUNNING runs of a store whose heartbeat stopped, with how long ago.

    Parameters
    ----------
    tracking : DictConfig, Mapping, str or TrackingSettings
        The tracking config or a store URI.
    experiment : str, optional
        Only this experiment; default every experiment of the store.
    lost_after_s : float, optional
        See :func:`lost_for_s`.

    Returns
    -------
    lost : list of (RunRecord, float)
        Each lost run with the seconds since its last heartbeat, oldest run first.
    running : list of RunRecord
        RUNNING runs that are not lost (a live heartbeat, or none recorded at all).
    """
    import dataclasses

    from skymoments.tracking.query import find_runs
    from skymoments.tracking.settings import settings_from

    settings = dataclasses.replace(settings_from(tracking), experiment=None)
    runs = find_runs(settings, experiment=experiment, filter_string="attributes.status = 'RUNNING'")
    lost, running = [], []
    for run in runs:
        age = lost_for_s(run.status, run.tags, now_s=now_s, lost_after_s=lost_after_s)
        if age is None:
            running.append(run)
        else:
            lost.append((run, age))
    return lost, running


def mark_lost(tracking, run_ids) -> None:
    """Mark runs KILLED whose heartbeat stopped (tag ``skymoments.stopped_by=heartbeat``).

    The end time is the run's last heartbeat: as near as the store knows to when it died.
    """
    from skymoments.tracking.settings import settings_from
    from skymoments.tracking.store import client_for, require_writable, with_retries

    settings = settings_from(tracking)
    require_writable(settings, "mark runs KILLED")
    client = client_for(settings)
    for run_id in run_ids:
        run = with_retries(settings, f"read run {run_id}", lambda r=run_id: client.get_run(r))
        last = last_heartbeat_s(run.data.tags)
        end_ms = int(last * 1000) if last is not None else None
        with_retries(
            settings,
            f"tag run {run_id}",
            lambda r=run_id: client.set_tag(r, STOPPED_BY_TAG, "heartbeat"),
        )
        with_retries(
            settings,
            f"mark run {run_id} KILLED",
            lambda r=run_id, e=end_ms: client.set_terminated(r, "KILLED", end_time=e),
        )
