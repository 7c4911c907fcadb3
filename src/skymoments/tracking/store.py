"""Talking to the store: clients, one-time SQLite set-up, retries, clear connection errors.

Concurrency
-----------
Several processes (a joblib sweep) may share one SQLite store. Two things go wrong without
care: MLflow creates the schema on first use, and two processes doing so at once fail or
corrupt it; and SQLite allows one writer at a time, so a busy writer makes others raise
``database is locked``. Hence :func:`prepare_store` creates the schema once under an
inter-process ``fcntl`` lock (and switches the database to write-ahead logging, which lets
readers and one writer proceed together), and :func:`with_retries` retries a locked call with
exponential backoff.

Servers
-------
An ``http(s)://`` store is probed once (``GET /health``, short timeout) before a run starts,
so an unreachable server is reported at once with the URI and what to check, rather than
after MLflow's own HTTP retries. Those retries are set by MLflow's environment variables
``MLFLOW_HTTP_REQUEST_MAX_RETRIES`` (default 7), ``MLFLOW_HTTP_REQUEST_BACKOFF_FACTOR``
(default 2) and ``MLFLOW_HTTP_REQUEST_TIMEOUT`` (seconds, default 120): with the defaults a
server that goes away mid-run is declared gone only after several minutes.
"""

from __future__ import annotations

import atexit
import contextlib
import fcntl
import logging
import os
import random
import shutil
import sqlite3
import tempfile
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TypeVar

import mlflow
from mlflow import MlflowClient
from mlflow.exceptions import MlflowException

from skymoments.tracking.settings import TrackingSettings, sqlite_path

__all__ = [
    "StoreReadOnlyError",
    "TrackingAccessError",
    "TrackingUnavailableError",
    "client_for",
    "ensure_experiment",
    "mlflow_uris",
    "prepare_store",
    "reading_uri",
    "require_writable",
    "with_retries",
]

log = logging.getLogger(__name__)
T = TypeVar("T")

_PREPARED: set[str] = set()
_PREPARED_LOCK = threading.Lock()

# Backoff for "database is locked": 12 tries, delays 0.05 s doubling up to 2 s (with jitter so
# that contending processes spread out), about 15 s in all before giving up.
_LOCK_RETRIES = 12
_LOCK_BASE_DELAY = 0.05
_LOCK_MAX_DELAY = 2.0
_PROBE_TIMEOUT_S = 5.0


class TrackingUnavailableError(RuntimeError):
    """The tracking store cannot be reached (server down, wrong URI, network)."""


class TrackingAccessError(TrackingUnavailableError):
    """The store refuses this client: missing or wrong credentials, or credentials kept where
    others can read them (in the URI, or in a credentials file open to other users)."""


class StoreReadOnlyError(TrackingAccessError):
    """A local store this process may read but not write, asked to record something."""


# Where MLflow's client reads credentials besides MLFLOW_TRACKING_USERNAME/PASSWORD
# (mlflow.utils.credentials): an ini file with an [mlflow] section.
CREDENTIALS_FILE = "~/.mlflow/credentials"
CREDENTIALS_HINT = (
    "set MLFLOW_TRACKING_USERNAME and MLFLOW_TRACKING_PASSWORD in the environment, or put "
    "mlflow_tracking_username and mlflow_tracking_password under [mlflow] in "
    f"{CREDENTIALS_FILE} (chmod 600); never in the config or on the command line"
)


def _chain(exc: BaseException) -> Iterator[BaseException]:
    seen: set[int] = set()
    current: BaseException | None = exc
    while current is not None and id(current) not in seen:
        seen.add(id(current))
        yield current
        current = current.__cause__ or current.__context__


def is_locked_error(exc: BaseException) -> bool:
    """True when ``exc`` (or its cause) is SQLite's ``database is locked``/busy error."""
    for item in _chain(exc):
        text = str(item).lower()
        if "database is locked" in text or "database table is locked" in text:
            return True
        if "sqlite_busy" in text:
            return True
    return False


_CONNECTION_MARKERS = (
    "max retries exceeded",
    "failed to establish a new connection",
    "connection refused",
    "connection reset",
    "connection aborted",
    "remotedisconnected",
    "read timed out",
    "timed out",
    "name or service not known",
    "temporary failure in name resolution",
    "no route to host",
)


def is_connection_error(exc: BaseException) -> bool:
    """True when ``exc`` says an HTTP tracking server could not be reached or went away."""
    for item in _chain(exc):
        if isinstance(item, (ConnectionError, TimeoutError, urllib.error.URLError)):
            return True
        name = type(item).__name__
        if name in ("ConnectionError", "ConnectTimeout", "ReadTimeout", "NewConnectionError"):
            return True
        text = str(item).lower()
        if any(marker in text for marker in _CONNECTION_MARKERS):
            return True
    return False


def is_access_error(exc: BaseException) -> bool:
    """True when ``exc`` (or its cause) is an HTTP 401 or 403 answer of the server."""
    for item in _chain(exc):
        code = str(getattr(item, "error_code", "") or "")
        if code in ("UNAUTHENTICATED", "PERMISSION_DENIED"):
            return True
        status = getattr(getattr(item, "response", None), "status_code", None)
        if status in (401, 403):
            return True
        text = str(item).lower()
        if "error code 401" in text or "error code 403" in text:
            return True
    return False


def access_message(uri: str, exc: BaseException) -> str:
    """A one-line message: the server refused us, and where credentials go."""
    first = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    return (
        f"the MLflow tracking server at {uri} refused this client ({first[:200]}); "
        f"{CREDENTIALS_HINT}; ask the server's admin for an account or permission"
    )


def check_credentials_kept_safe(uri: str) -> None:
    """Refuse credentials in the tracking URI, and a credentials file others can read.

    Raises
    ------
    TrackingAccessError
    """
    from urllib.parse import urlsplit

    parts = urlsplit(uri)
    if parts.username or parts.password:
        shown = parts._replace(netloc=parts.hostname or "").geturl()
        raise TrackingAccessError(
            f"tracking.uri holds a user name or password ({shown} with credentials): a URI "
            f"is seen in configs, logs and the process list; give {shown} and "
            f"{CREDENTIALS_HINT}"
        )
    path = Path(os.path.expanduser(CREDENTIALS_FILE))
    try:
        mode = path.stat().st_mode
    except OSError:
        return
    if mode & 0o077:
        raise TrackingAccessError(
            f"{path} holds tracking credentials but other users may read it (mode "
            f"{mode & 0o777:o}); run `chmod 600 {path}`"
        )


def unavailable_message(uri: str, detail: str = "") -> str:
    """A message naming the URI and what to check."""
    hint = (
        f"cannot reach the MLflow tracking server at {uri}. Check that `mlflow server` is "
        "running there and reachable from this machine (host, port, firewall, proxy), and that "
        "tracking.uri is right; or use tracking=local for the embedded store. MLflow retries "
        "HTTP calls per MLFLOW_HTTP_REQUEST_MAX_RETRIES and MLFLOW_HTTP_REQUEST_TIMEOUT."
    )
    return f"{hint} ({detail})" if detail else hint


def with_retries(settings: TrackingSettings, what: str, fn: Callable[[], T]) -> T:
    """Call ``fn``; retry SQLite lock errors with backoff; translate lost connections.

    Parameters
    ----------
    settings : TrackingSettings
        The store ``fn`` talks to (named in errors).
    what : str
        What the call does, for messages (``"log metrics"``).
    fn : callable
        The store call, without arguments.

    Raises
    ------
    TrackingUnavailableError
        The HTTP server could not be reached.
    MlflowException
        Any other store error, or a lock that outlasted every retry.
    """
    for attempt in range(_LOCK_RETRIES):
        try:
            return fn()
        except Exception as exc:
            if settings.is_http and is_access_error(exc):
                raise TrackingAccessError(access_message(settings.tracking_uri, exc)) from exc
            if settings.is_http and is_connection_error(exc):
                raise TrackingUnavailableError(
                    unavailable_message(settings.tracking_uri, f"while trying to {what}: {exc}")
                ) from exc
            if not is_locked_error(exc) or attempt == _LOCK_RETRIES - 1:
                raise
            delay = min(_LOCK_MAX_DELAY, _LOCK_BASE_DELAY * 2**attempt)
            time.sleep(delay * random.uniform(0.5, 1.5))
    raise AssertionError("unreachable")  # pragma: no cover


@contextlib.contextmanager
def _file_lock(path: Path) -> Iterator[None]:
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a+") as handle:
        fcntl.flock(handle.fileno(), fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(handle.fileno(), fcntl.LOCK_UN)


def probe_server(uri: str, timeout: float = _PROBE_TIMEOUT_S) -> None:
    """Check that an HTTP tracking server answers; raise :class:`TrackingUnavailableError`.

    Any HTTP answer (even 401 or 404 behind a proxy) counts as reachable: only a failed
    connection or a timeout is an error here.
    """
    try:
        with urllib.request.urlopen(f"{uri}/health", timeout=timeout):  # noqa: S310
            return
    except urllib.error.HTTPError:
        return
    except (urllib.error.URLError, OSError, TimeoutError) as exc:
        reason = getattr(exc, "reason", exc)
        raise TrackingUnavailableError(unavailable_message(uri, f"{reason}")) from exc


def connect_read_only(db: Path) -> sqlite3.Connection:
    """A read-only connection to SQLite file ``db``, that writes nothing beside it.

    ``mode=ro`` first; a database in write-ahead-log mode in a folder this process cannot
    write cannot be opened so (SQLite needs to create its ``-shm`` index), and is then opened
    ``immutable=1``: read as it is on disk, with no locking. That is right for a store no one
    can write; a store its owner is writing keeps its ``-shm``, and ``mode=ro`` works there.
    """
    uri = db.absolute().as_uri()
    con = sqlite3.connect(f"{uri}?mode=ro", uri=True)
    try:
        con.execute("SELECT 1 FROM sqlite_master LIMIT 1").fetchall()
        return con
    except sqlite3.OperationalError:
        con.close()
    wal = db.with_name(db.name + "-wal")
    if wal.is_file() and wal.stat().st_size > 0:
        # Committed transactions still in the log (a writer that did not close cleanly):
        # ``immutable`` would not see them. A copy of both files, opened where SQLite may
        # write, replays the log into the copy.
        copy = _private_folder() / db.name
        shutil.copyfile(db, copy)
        shutil.copyfile(wal, copy.with_name(copy.name + "-wal"))
        return sqlite3.connect(copy)
    return sqlite3.connect(f"{uri}?immutable=1", uri=True)


def _private_folder() -> Path:
    """A new temporary folder, removed when the process ends."""
    folder = Path(tempfile.mkdtemp(prefix="skymoments-read-only-store-"))
    atexit.register(shutil.rmtree, folder, True)
    return folder


def _schema_present(db: Path) -> bool:
    """True when MLflow's schema is in ``db`` (its migration table has a version)."""
    if not db.exists() or db.stat().st_size == 0:
        return False
    try:
        with contextlib.closing(connect_read_only(db)) as con:
            row = con.execute("SELECT version_num FROM alembic_version").fetchone()
    except sqlite3.Error:
        return False
    return row is not None and bool(row[0])


def read_only_reason(db: Path) -> str | None:
    """Why this process cannot write the SQLite store ``db`` (None when it can).

    A store needs its file and its folder writable (SQLite writes its journal and ``-shm``
    beside the database, and the lock file lives there too).
    """
    if db.exists() and not os.access(db, os.W_OK):
        return f"{db} is read-only for this user"
    folder = db.parent
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    if not os.access(folder, os.W_OK):
        return f"its folder {folder} is read-only for this user"
    return None


_SNAPSHOTS: dict[str, str] = {}


def _snapshot(db: Path) -> str:
    """The URI of a private copy of read-only store ``db``, made once per process.

    MLflow's SQLite client cannot open a write-ahead-log database in a folder it cannot
    write, so reads go to a consistent copy (SQLite's online backup) in a temporary folder.
    Artifact locations in it stay the original absolute paths, so artifacts are read in
    place. Nothing is ever written to the copy: writers refuse a read-only store first.
    """
    key = str(db)
    if key not in _SNAPSHOTS:
        copy = _private_folder() / db.name
        with contextlib.closing(connect_read_only(db)) as src:
            with contextlib.closing(sqlite3.connect(copy)) as dst:
                src.backup(dst)
                dst.execute("PRAGMA journal_mode=DELETE")
        _SNAPSHOTS[key] = f"sqlite:///{copy}"
        log.info("%s cannot be written; reading a copy of it", db)
    return _SNAPSHOTS[key]


def reading_uri(settings: TrackingSettings) -> str:
    """The URI that reads ``settings``' store: itself, or a copy of a read-only SQLite store."""
    db = settings.sqlite_path
    if db is not None and db.is_file() and read_only_reason(db) is not None:
        return _snapshot(db)
    return settings.tracking_uri


def require_writable(settings: TrackingSettings, what: str = "track a run") -> None:
    """Refuse, in one line, to write to a local store this process cannot write.

    Raises
    ------
    StoreReadOnlyError
    """
    db = settings.sqlite_path
    if db is None:
        return
    reason = read_only_reason(db)
    if reason is not None:
        raise StoreReadOnlyError(
            f"the tracking store {db} cannot be written ({reason}), so skymoments cannot "
            f"{what} there; reading it works (compare with compare.log_report=false, "
            "settle without settle.mark); to write, point tracking.root at a folder you can "
            "write"
        )


def prepare_store(settings: TrackingSettings) -> None:
    """Make the store usable, once per process and URI.

    For SQLite: create the folder, then, under an exclusive ``fcntl`` lock on
    ``<db>.lock``, switch a new database to WAL and let MLflow create or upgrade the schema, so
    concurrent first users never race. For HTTP: probe the server.
    """
    uri = settings.tracking_uri
    with _PREPARED_LOCK:
        if uri in _PREPARED:
            return
    if settings.is_http:
        check_credentials_kept_safe(uri)
        probe_server(uri)
    else:
        db = sqlite_path(uri)
        if db is not None and read_only_reason(db) is not None:
            # Reading needs no lock, and a store that cannot be written cannot be set up.
            if not _schema_present(db):
                raise StoreReadOnlyError(
                    f"{db} holds no MLflow tables and cannot be written "
                    f"({read_only_reason(db)}); point tracking.root at an existing store or "
                    "a folder you can write"
                )
        elif db is not None:
            with _file_lock(db.with_name(db.name + ".lock")):
                if not _schema_present(db):
                    if not db.exists() or db.stat().st_size == 0:
                        # WAL is a property of the database file: set once, it stays.
                        with contextlib.closing(sqlite3.connect(db)) as con:
                            con.execute("PRAGMA journal_mode=WAL")
                    client = MlflowClient(uri, registry_uri=uri)
                    # Touch both stores: MLflow creates the tables on first access.
                    client.search_experiments(max_results=1)
                    client.search_registered_models(max_results=1)
            # A store whose schema exists needs no lock: opening it only reads, so processes
            # that arrive later open it side by side instead of one after the other.
    with _PREPARED_LOCK:
        _PREPARED.add(uri)


def client_for(settings: TrackingSettings) -> MlflowClient:
    """A client bound to ``settings.tracking_uri`` for both tracking and the registry.

    Binding the registry explicitly keeps a process-wide ``mlflow.set_registry_uri`` (or
    ``MLFLOW_REGISTRY_URI``) from sending registrations elsewhere. A local store this process
    cannot write is read through a copy (:func:`reading_uri`); whatever writes calls
    :func:`require_writable` first.
    """
    prepare_store(settings)
    uri = reading_uri(settings)
    return MlflowClient(uri, registry_uri=uri)


def _experiment_artifact_location(settings: TrackingSettings, name: str) -> str | None:
    if settings.artifact_location is None:
        return None
    slug = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in name) or "experiment"
    return f"{settings.artifact_location.rstrip('/')}/{slug}"


def ensure_experiment(client: MlflowClient, settings: TrackingSettings, name: str) -> str:
    """Id of the experiment ``name``, created when missing (safe under concurrent creators).

    A new experiment of a local store stores its artifacts in
    ``<artifact_location>/<name with unsafe characters replaced>``.
    """

    def get_or_create() -> str:
        experiment = client.get_experiment_by_name(name)
        if experiment is not None:
            if experiment.lifecycle_stage == "deleted":
                raise ValueError(
                    f"experiment {name!r} is deleted in {settings.tracking_uri}; restore it "
                    "(mlflow experiments restore) or choose another tracking.experiment"
                )
            return experiment.experiment_id
        try:
            return client.create_experiment(
                name, artifact_location=_experiment_artifact_location(settings, name)
            )
        except MlflowException as exc:
            if "already exists" in str(exc).lower() or "unique constraint" in str(exc).lower():
                # Another process created it between our lookup and create.
                found = client.get_experiment_by_name(name)
                if found is not None:
                    return found.experiment_id
            raise

    return with_retries(settings, f"find or create experiment {name!r}", get_or_create)


@contextlib.contextmanager
def mlflow_uris(uri: str) -> Iterator[None]:
    """Point MLflow's process-wide tracking and registry URIs at ``uri`` for a block.

    Needed for the few MLflow calls that only read the global URIs (``Model.log``,
    ``register_model``, downloading a model). The previous state, including the
    ``MLFLOW_TRACKING_URI`` and ``MLFLOW_REGISTRY_URI`` environment variables that
    ``set_tracking_uri`` writes, is put back exactly afterwards, so nothing leaks into later
    runs of the same process.
    """
    from mlflow.tracking._model_registry import utils as registry_utils
    from mlflow.tracking._tracking_service import utils as tracking_utils

    saved_tracking = tracking_utils._tracking_uri
    saved_registry = registry_utils._registry_uri
    saved_env = {k: os.environ.get(k) for k in ("MLFLOW_TRACKING_URI", "MLFLOW_REGISTRY_URI")}
    mlflow.set_tracking_uri(uri)
    mlflow.set_registry_uri(uri)
    try:
        yield
    finally:
        mlflow.set_tracking_uri(saved_tracking)
        registry_utils._registry_uri = saved_registry
        for key, value in saved_env.items():
            if value is None:
                os.environ.pop(key, None)
            else:
                os.environ[key] = value
