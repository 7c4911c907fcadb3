"""Where runs go: turn the ``tracking`` config node into a tracking URI, an artifact root and an
experiment name.

Two kinds of store are supported (``conf/tracking/``):

``local``
    An embedded SQLite store ``<root>/mlflow.db`` and a local artifact folder
    ``<root>/artifacts``, both at absolute paths under the *launch folder*: the folder where
    the user ran the command. Under Hydra that is ``hydra.runtime.cwd`` (Hydra may change the
    working directory of a job, and a relative store would then be scattered over job
    folders); otherwise it is ``os.getcwd()``.
``server``
    A team's ``mlflow server`` at ``tracking.uri`` (``http://host:port``); the server decides
    where artifacts go.
"""

from __future__ import annotations

import contextlib
import os
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

__all__ = [
    "TrackingSettings",
    "launch_dir",
    "resolve_tracking",
    "settings_from",
]

_KINDS = ("local", "server")
_URI_SCHEME = re.compile(r"^[a-zA-Z][a-zA-Z0-9+.\-]*://")


@dataclass(frozen=True)
class TrackingSettings:
    """Resolved tracking settings.

    Attributes
    ----------
    kind : str
        ``"local"``, ``"server"`` or ``"uri"`` (a bare URI was given).
    tracking_uri : str
        Absolute MLflow tracking URI (``sqlite:////abs/path/mlflow.db``, ``http://host:port``).
    artifact_location : str or None
        Root URI under which each experiment gets its artifact folder, or None to let the
        store (or the server) decide.
    experiment : str or None
        Experiment name; None only for settings built from a bare URI.
    register_as : str or None
        Registered-model name that the run's model goes under, if any.
    """

    kind: str
    tracking_uri: str
    artifact_location: str | None
    experiment: str | None
    register_as: str | None = None

    @property
    def sqlite_path(self) -> Path | None:
        """Path of the SQLite database file for an ``sqlite:///`` URI, else None."""
        return sqlite_path(self.tracking_uri)

    @property
    def is_http(self) -> bool:
        """True for an ``http(s)://`` tracking server."""
        return self.tracking_uri.startswith(("http://", "https://"))


def sqlite_path(uri: str) -> Path | None:
    """The database file of an ``sqlite:///`` URI (None for other schemes or in-memory)."""
    prefix = "sqlite:///"
    if not uri.startswith(prefix):
        return None
    rest = uri[len(prefix) :].split("?", 1)[0]
    if not rest or rest == ":memory:":
        return None
    # sqlite:////abs/path -> rest "/abs/path"; sqlite:///rel/path -> rest "rel/path"
    return Path(rest)


def launch_dir() -> Path:
    """The folder where the user ran the command.

    Returns
    -------
    path : pathlib.Path
        ``hydra.runtime.cwd`` when a Hydra app is running, else ``os.getcwd()``; absolute.
    """
    try:
        from hydra.core.hydra_config import HydraConfig

        if HydraConfig.initialized():
            cwd = HydraConfig.get().runtime.cwd
            if cwd:
                return Path(str(cwd)).absolute()
    except (ImportError, ValueError, AttributeError):
        # Hydra absent or no runtime node (compose API without hydra config): fall back.
        pass
    return Path(os.getcwd()).absolute()


def _as_plain(node: Any) -> dict[str, Any]:
    if isinstance(node, DictConfig):
        plain = OmegaConf.to_container(node, resolve=True, throw_on_missing=False)
        assert isinstance(plain, dict)
        _unset_as_none(node, plain)
        return plain
    if isinstance(node, Mapping):
        # Through OmegaConf, so a "???" in a plain mapping is MISSING as in a composed config
        # (a mapping holding values OmegaConf cannot hold is read as it is).
        try:
            return _as_plain(OmegaConf.create(dict(node)))
        except (OmegaConfBaseException, ValueError):
            return dict(node)
    raise ValueError(
        f"tracking settings must be a mapping (the cfg.tracking node), got {type(node).__name__};"
        " pass cfg.tracking, the whole cfg, or a tracking URI string"
    )


def _unset_as_none(node: DictConfig, plain: dict[str, Any]) -> None:
    """Mandatory values left unset (OmegaConf's MISSING) read as None, nested nodes too."""
    for key in node.keys():
        if OmegaConf.is_missing(node, key):
            plain[key] = None
        elif isinstance(plain.get(key), dict):
            child = node._get_node(key)
            if isinstance(child, DictConfig):
                _unset_as_none(child, plain[key])


def _missing(value: Any) -> bool:
    return value is None or value == ""


def resolve_tracking(
    tracking: Any, *, base_dir: str | os.PathLike | None = None
) -> tuple[str, str | None, str | None]:
    """Resolve a ``tracking`` config node to concrete locations.

    Parameters
    ----------
    tracking : DictConfig or Mapping
        The ``cfg.tracking`` node (``kind``, ``root``, ``uri``, ``artifact_location``,
        ``experiment``, ``register_as``).
    base_dir : path-like, optional
        Folder that a relative ``root`` is taken under; default :func:`launch_dir`.

    Returns
    -------
    tracking_uri : str
        Absolute MLflow tracking URI.
    artifact_location : str or None
        Artifact root URI (``file:///abs/...`` for a local store), or None for a server.
    experiment_name : str
        The experiment runs go into.

    Raises
    ------
    ValueError
        An unknown ``kind``, a server without ``uri``, or a missing experiment name.
    """
    s = settings_from(tracking, base_dir=base_dir)
    return s.tracking_uri, s.artifact_location, s.experiment


def settings_from(tracking: Any, *, base_dir: str | os.PathLike | None = None) -> TrackingSettings:
    """Build :class:`TrackingSettings` from a tracking node, a whole config or a URI string.

    Parameters
    ----------
    tracking : DictConfig, Mapping, str, pathlib.Path or TrackingSettings
        ``cfg.tracking``; a whole composed config holding a ``tracking`` node; a tracking URI
        (``sqlite:///...``, ``http://...``); or a path to an ``mlflow.db`` file or to a local
        store root folder (which holds ``mlflow.db``).
    base_dir : path-like, optional
        Folder that relative paths are taken under; default :func:`launch_dir`.
    """
    if isinstance(tracking, TrackingSettings):
        return tracking
    base = Path(base_dir).absolute() if base_dir is not None else launch_dir()
    if isinstance(tracking, (str, os.PathLike)):
        return _settings_from_uri(os.fspath(tracking), base)
    node = _as_plain(tracking)
    if "kind" not in node and isinstance(node.get("tracking"), Mapping):
        node = dict(node["tracking"])
    kind = node.get("kind")
    if kind not in _KINDS:
        raise ValueError(
            f"tracking.kind must be one of {_KINDS}, got {kind!r}; "
            "pick a preset with tracking=local or tracking=server"
        )
    experiment = node.get("experiment")
    if _missing(experiment):
        raise ValueError("tracking.experiment is empty; set tracking.experiment=<name>")
    experiment = str(experiment)
    register_as = node.get("register_as")
    register_as = None if _missing(register_as) else str(register_as)
    uri = node.get("uri")
    artifact_location = node.get("artifact_location")
    artifact_location = None if _missing(artifact_location) else str(artifact_location)

    if kind == "server":
        if _missing(uri):
            raise ValueError(
                "tracking=server needs tracking.uri=http://host:port (the team's mlflow server)"
            )
        uri = str(uri)
        if not uri.startswith(("http://", "https://")):
            raise ValueError(
                f"tracking.uri={uri!r} is not an http(s) URL; a server is reached as "
                "http://host:port (use tracking=local for a file store)"
            )
        return TrackingSettings(
            "server", uri.rstrip("/"), artifact_location, experiment, register_as
        )

    # kind == "local"
    root_value = node.get("root")
    if _missing(root_value):
        raise ValueError("tracking.root is empty; set tracking.root=<folder> for the local store")
    root = Path(str(root_value)).expanduser()
    if not root.is_absolute():
        root = base / root
    root = Path(os.path.normpath(root))
    if _missing(uri):
        tracking_uri = f"sqlite:///{(root / 'mlflow.db').as_posix()}"
    else:
        tracking_uri = _absolute_uri(str(uri), base)
    if artifact_location is None:
        artifact_location = (root / "artifacts").as_uri()
    elif not _URI_SCHEME.match(artifact_location):
        path = Path(artifact_location).expanduser()
        artifact_location = (path if path.is_absolute() else base / path).as_uri()
    return TrackingSettings("local", tracking_uri, artifact_location, experiment, register_as)


def _absolute_uri(uri: str, base: Path) -> str:
    """Make a relative ``sqlite:///rel.db`` absolute under ``base``; other URIs unchanged."""
    path = sqlite_path(uri)
    if path is not None and not path.is_absolute():
        return f"sqlite:///{(base / path).as_posix()}"
    return uri


def _settings_from_uri(text: str, base: Path) -> TrackingSettings:
    if _URI_SCHEME.match(text) or text.startswith("sqlite:"):
        uri = _absolute_uri(text, base)
        kind = "server" if uri.startswith(("http://", "https://")) else "uri"
        return TrackingSettings(kind, uri.rstrip("/") if kind == "server" else uri, None, None)
    path = Path(text).expanduser()
    path = path if path.is_absolute() else base / path
    if path.is_dir():
        path = path / "mlflow.db"
    if not path.is_file():
        raise ValueError(
            f"{text!r} is neither a tracking URI nor an existing MLflow SQLite store; pass "
            "sqlite:////abs/mlflow.db, http://host:port, or the store's root folder"
        )
    return TrackingSettings("uri", f"sqlite:///{path.as_posix()}", None, None)


@contextlib.contextmanager
def quiet_artifact_downloads() -> Iterator[None]:
    """Turn MLflow's per-file download progress bars off for a block (they clutter output)."""
    key = "MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR"
    saved = os.environ.get(key)
    os.environ[key] = "false"
    try:
        yield
    finally:
        if saved is None:
            os.environ.pop(key, None)
        else:
            os.environ[key] = saved
