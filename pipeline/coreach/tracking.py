"""MLflow access: an embedded sqlite store in the working directory by default, or a server by URI."""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import os
import re
import subprocess
import tempfile
from importlib import metadata
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

LIBRARIES = ("coreach", "torch", "lightning", "hydra-core", "mlflow", "numpy", "pytorch-kinematics", "pyarrow")


# the environment variables that name the tracking store, first found wins (the robot's fetch reads the same)
URI_VARIABLES = ("COREACH_TRACKING_URI", "MLFLOW_TRACKING_URI")


def resolve_uri(uri: str | None) -> str:
    """The tracking store: `uri` (tracking.uri, --uri) if given, else COREACH_TRACKING_URI, else
    MLFLOW_TRACKING_URI, else sqlite:///<cwd>/mlflow.db. A plain file path (e.g. ./mlflow.db) means that
    sqlite file."""
    chosen = str(uri) if uri else next((os.environ[v] for v in URI_VARIABLES if os.environ.get(v)), None)
    if not chosen:
        return f"sqlite:///{Path.cwd() / 'mlflow.db'}"
    if "://" not in chosen and (chosen.endswith(".db") or Path(chosen).expanduser().is_file()):
        return f"sqlite:///{Path(chosen).expanduser().resolve()}"
    return chosen


def artifact_root(uri: str, configured: str | None) -> str | None:
    """Local artifacts beside an embedded store (./mlartifacts); a server decides for itself."""
    if configured:
        return Path(configured).resolve().as_uri() if "://" not in configured else configured
    if uri.startswith("sqlite:"):
        return (Path.cwd() / "mlartifacts").resolve().as_uri()
    return None


def sqlite_path(uri: str) -> Path | None:
    """The database file of a `sqlite:///` URI (None for other stores and in-memory sqlite)."""
    if not uri.startswith("sqlite:///"):
        return None
    path = uri[len("sqlite:///") :].split("?", 1)[0]
    return Path(path) if path and path != ":memory:" else None


@contextlib.contextmanager
def _store_lock(uri: str):
    """Serialise the first use of an embedded store across processes: several processes creating a fresh
    sqlite store at once race in its schema migration (tables already exist, version row mismatch). Covers
    processes on one machine (joblib workers, parallel `coreach train`), which is where sqlite belongs."""
    db = sqlite_path(uri)
    if db is None:
        yield
        return
    # the lock lives in the temp folder, keyed by the store's path, so no stray file sits beside the store
    key = hashlib.sha256(str(db.resolve()).encode()).hexdigest()[:16]
    # read-only is enough for flock, and lets another user's process share a lock file it did not create
    fd = os.open(Path(tempfile.gettempdir()) / f"coreach-store-{key}.lock", os.O_RDONLY | os.O_CREAT, 0o666)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)  # closing releases the lock


def client(cfg_tracking: DictConfig):
    """An MlflowClient on the configured store, and the id of the configured experiment (created if new)."""
    import mlflow  # late: mlflow (~1.3 s); the URI helpers need none
    from mlflow.tracking import MlflowClient  # late: mlflow (~1.3 s); the URI helpers need none

    # stdout belongs to `--json`: MLflow would print a "View run at" link there for a server URI
    os.environ.setdefault("MLFLOW_SUPPRESS_PRINTING_URL_TO_STDOUT", "true")
    uri = resolve_uri(cfg_tracking.get("uri"))
    mlflow.set_tracking_uri(uri)
    with _store_lock(uri):
        c = MlflowClient(tracking_uri=uri)
        return c, _experiment_id(c, uri, cfg_tracking)


def _experiment_id(c, uri: str, cfg_tracking: DictConfig) -> str:
    name = cfg_tracking.experiment
    exp = c.get_experiment_by_name(name)
    if exp is None:
        try:
            exp_id = c.create_experiment(name, artifact_location=artifact_root(uri, cfg_tracking.get("artifacts")))
        except Exception:  # another process of a parallel sweep created it first
            exp = c.get_experiment_by_name(name)
            if exp is None:
                raise
            exp_id = exp.experiment_id
    else:
        exp_id = exp.experiment_id
    return exp_id


def flatten(cfg: DictConfig) -> dict[str, str]:
    """Resolved config as dotted key -> string (MLflow params), skipping hydra's own node."""

    out: dict[str, str] = {}

    def walk(node, prefix):
        if isinstance(node, dict):
            for k, v in node.items():
                walk(v, f"{prefix}{k}.")
        elif isinstance(node, list) and not any(isinstance(x, (dict, list)) for x in node):
            out[prefix[:-1]] = json.dumps(node)
        elif isinstance(node, list):
            for i, v in enumerate(node):
                walk(v, f"{prefix}{i}.")
        else:
            out[prefix[:-1]] = str(node)

    walk(OmegaConf.to_container(cfg, resolve=True), "")
    return {_param_key(k): v[:6000] for k, v in out.items() if not k.startswith("hydra.")}


def _param_key(key: str) -> str:
    """MLflow accepts only alphanumerics, _ - . space : / in keys."""
    return re.sub(r"[^A-Za-z0-9_\-. :/]", "_", key)


def git_commit() -> str | None:
    """Commit of the source tree coreach runs from, when it is a git checkout."""
    here = Path(__file__).resolve().parent
    try:
        out = subprocess.run(
            ["git", "-C", str(here), "rev-parse", "HEAD"], capture_output=True, text=True, timeout=5, check=False
        )
    except (OSError, subprocess.TimeoutExpired):
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


def library_versions() -> dict[str, str]:
    versions = {}
    for lib in LIBRARIES:
        try:
            versions[lib] = metadata.version(lib)
        except metadata.PackageNotFoundError:
            versions[lib] = "not installed"
    return versions


def log_params_batched(c, run_id: str, params: dict[str, str]) -> None:
    """Params in batches of 100 (MLflow's per-call limit) so a server sees few round trips."""
    from mlflow.entities import Param  # late: mlflow (~1.3 s); the URI helpers need none

    items = [Param(k, v) for k, v in sorted(params.items())]
    for i in range(0, len(items), 100):
        c.log_batch(run_id, params=items[i : i + 100])


def log_json(c, run_id: str, obj, artifact_file: str) -> None:
    c.log_text(run_id, json.dumps(obj, indent=2, sort_keys=True), artifact_file)


def log_folder(c, run_id: str, writer, artifact_path: str) -> None:
    """Have `writer(folder)` fill a temporary folder, then log it as one artifact directory."""
    with tempfile.TemporaryDirectory() as tmp:
        writer(Path(tmp))
        c.log_artifacts(run_id, tmp, artifact_path)
