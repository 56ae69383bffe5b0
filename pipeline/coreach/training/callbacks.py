"""Lightning callbacks kept apart from the model: per-epoch metric logging to MLflow, and the progress bar."""

from __future__ import annotations

import time

import lightning as L
from lightning.pytorch.callbacks import RichProgressBar
from mlflow.entities import Metric

from coreach.progress import interactive


class MlflowEpochLogger(L.Callback):
    """Sends every epoch-level metric (train and val, per loss term) to MLflow in one batch per epoch."""

    def __init__(self, client, run_id: str):
        self.client, self.run_id = client, run_id
        self.history: list[dict[str, float]] = []

    def on_train_epoch_end(self, trainer: L.Trainer, pl_module: L.LightningModule) -> None:
        # In Lightning 2.x validation has already run when this hook fires, so val/* are current.
        values = {k: float(v) for k, v in trainer.callback_metrics.items() if k.startswith(("train/", "val/"))}
        self.history.append(values)
        now = int(time.time() * 1000)
        metrics = [Metric(k, v, now, trainer.current_epoch) for k, v in sorted(values.items())]
        self.client.log_batch(self.run_id, metrics=metrics)

    # The history travels in Lightning checkpoints, so a resumed run knows its earlier epochs.
    def state_dict(self) -> dict:
        return {"history": list(self.history)}

    def load_state_dict(self, state_dict: dict) -> None:
        self.history = list(state_dict.get("history", []))


def progress_callbacks() -> list[L.Callback]:
    if not interactive():
        return []

    return [RichProgressBar(console_kwargs={"stderr": True})]
