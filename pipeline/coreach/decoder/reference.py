"""Loading a trained decoder by reference: a folder, an MLflow run id, or a registered model version.

The tracking store is an argument, never an environment variable: two stores in one process (a test, a lab
comparing a shared server with a laptop's sqlite) cannot leak into each other.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from mlflow.exceptions import MlflowException
from mlflow.tracking import MlflowClient

from coreach.decoder.policy import DecoderPolicy
from coreach.errors import ConfigError

ARTIFACT = "decoder"  # artifact folder written by coreach.training.run
FILES = ("decoder.safetensors", "decoder.json")
EXPECTED = f"an MLflow run id, models:/<name>/<version>, models:/<name>@<alias> or a folder with {' + '.join(FILES)}"


def _first_line(exc: Exception) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def registry_run(client: MlflowClient, ref: str, where: str) -> str:
    """Run id behind models:/<name>/<version> or models:/<name>@<alias>."""
    rest = ref[len("models:/") :]
    try:
        if "@" in rest:
            model, alias = rest.split("@", 1)
            version = client.get_model_version_by_alias(model, alias)
        elif "/" in rest:
            model, number = rest.rsplit("/", 1)
            version = client.get_model_version(model, number)
        else:
            raise ConfigError(where, f"expected models:/<name>/<version> or models:/<name>@<alias>, got {ref!r}")
    except MlflowException as exc:
        raise ConfigError(where, f"registered model {ref!r} not found in the tracking store ({_first_line(exc)})")
    if not version.run_id:
        raise ConfigError(where, f"registered model {ref!r} is not linked to a run, so its decoder cannot be found")
    return str(version.run_id)


def label(reference: str) -> str:
    """A short name for tables and plots."""
    if reference.startswith("models:/"):
        return reference[len("models:/") :]
    if Path(reference).expanduser().is_dir():
        return Path(reference).expanduser().resolve().name
    return f"decoder-{reference[:8]}"


def load(reference: str, store: str, where: str = "decoder") -> tuple[DecoderPolicy, str]:
    """(policy, source): the decoder named by `reference`, read from the tracking store `store` (a URI, see
    coreach.tracking.resolve_uri) unless it is a folder; source is the run id or the folder."""
    if not isinstance(reference, str) or not reference.strip() or reference == "???":
        raise ConfigError(where, f"expected {EXPECTED}; got {reference!r}")
    folder = Path(reference).expanduser()
    if folder.is_dir():
        missing = [f for f in FILES if not (folder / f).is_file()]
        if missing:
            raise ConfigError(f"{where} ({folder})", f"folder lacks {missing}; expected a decoder saved by coreach")
        return DecoderPolicy.load(folder), str(folder)
    registered = reference.startswith("models:/")
    if not registered and ("/" in reference or "\\" in reference or reference.startswith((".", "~"))):
        raise ConfigError(f"{where} ({reference})", "no such folder (run ids have no slashes)")
    client = MlflowClient(tracking_uri=store)
    run_id = registry_run(client, reference, where) if registered else reference
    try:
        client.get_run(run_id)
    except MlflowException as exc:
        raise ConfigError(where, f"run {run_id!r} not found in the tracking store {store} ({_first_line(exc)})")
    with tempfile.TemporaryDirectory() as tmp:
        try:
            local = Path(client.download_artifacts(run_id, ARTIFACT, tmp))
        except Exception as exc:  # stores differ in what they raise for a missing artifact
            raise ConfigError(where, f"run {run_id!r} has no {ARTIFACT}/ artifact ({_first_line(exc)}); "
                              "was it logged by coreach train?")  # fmt: skip
        if not all((local / f).is_file() for f in FILES):
            raise ConfigError(where, f"run {run_id!r}: artifact {ARTIFACT}/ lacks {' or '.join(FILES)}")
        return DecoderPolicy.load(local), run_id  # tensors are read into memory before tmp goes
