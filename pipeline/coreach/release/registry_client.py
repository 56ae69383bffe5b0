"""The MLflow model registry, reached: a client on the tracking store and the registered models and versions in it.

The bottom of the release modules: the bundle store, the registry commands and the settling of interrupted
publishes all look versions up through here, and it imports none of them.
"""

from __future__ import annotations

from coreach.errors import ConfigError
from coreach.tracking import resolve_uri


def client_for(uri: str | None = None):
    """An MlflowClient on the tracking store `uri` (None: coreach.tracking.resolve_uri's default)."""
    from mlflow.tracking import MlflowClient  # late: mlflow (~1.3 s); a bundle folder needs none

    return MlflowClient(tracking_uri=resolve_uri(uri))


def _missing(exc: Exception) -> bool:
    from mlflow.exceptions import MlflowException  # late: mlflow (~1.3 s) only when a store is reached

    return isinstance(exc, MlflowException) and "RESOURCE_DOES_NOT_EXIST" in str(getattr(exc, "error_code", ""))


def get_model(client, name: str):
    """The registered model `name`, or None."""
    from mlflow.exceptions import MlflowException  # late: mlflow (~1.3 s) only when a store is reached

    try:
        return client.get_registered_model(name)
    except MlflowException as exc:
        if _missing(exc):
            return None
        raise


def get_version(client, name: str, version: str):
    """Version `version` of registered model `name`; ConfigError naming the model when there is none."""
    from mlflow.exceptions import MlflowException  # late: mlflow (~1.3 s) only when a store is reached

    try:
        return client.get_model_version(name, str(version))
    except MlflowException as exc:
        if _missing(exc):
            raise ConfigError(f"model {name}", f"has no version {version!r}; see coreach bundles {name}") from None
        raise


__all__ = ["client_for", "get_model", "get_version"]
