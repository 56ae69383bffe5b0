"""The training stage: config -> robot, demonstrations, belief replay -> Lightning fit -> MLflow run."""

from __future__ import annotations

import logging
import sys
import time
from pathlib import Path

import hydra
import lightning as L
import torch
from lightning.pytorch.callbacks import EarlyStopping, ModelCheckpoint
from lightning.pytorch.utilities.exceptions import SIGTERMException
from mlflow.entities import Metric
from mlflow.exceptions import MlflowException
from omegaconf import DictConfig, OmegaConf

from coreach import tracking
from coreach.context import ContextSpec
from coreach.errors import ConfigError
from coreach.host.registry import build_plugin, build_terms
from coreach.decoder.policy import DecoderPolicy
from coreach.world.robot_identity import robot_tags
from coreach.safety import limits_from_config
from coreach.training.callbacks import MlflowEpochLogger, progress_callbacks
from coreach.training.data import DemoDataModule, replay, split_by_episode
from coreach.training.system import DecoderSystem
from coreach.config.workdirs import output_dir, sweep_tag

log = logging.getLogger("coreach.train")


def prepare(cfg: DictConfig):
    """Robot, demonstrations and train/val samples for a training config (shared with the benchmark)."""
    robot = build_plugin(cfg.robot, "robot")
    episodes = build_plugin(cfg.dataset, "dataset").load(robot)
    belief = build_plugin(cfg.belief, "belief")
    samples = replay(episodes, robot, belief)
    train_s, val_s = split_by_episode(samples, cfg.data.val_fraction, cfg.seed)
    return robot, episodes, train_s, val_s


def build_system(cfg: DictConfig, robot, episodes, train_s) -> DecoderSystem:
    spec = ContextSpec(dof=robot.dof, n_goals=len(episodes.goal_names))
    model_cfg = OmegaConf.to_container(cfg.model, resolve=True)
    policy = DecoderPolicy.build(model_cfg, spec, robot.dof)
    policy.set_normalisation(train_s.context, train_s.action)
    limits = limits_from_config(robot, cfg.safety)
    return DecoderSystem(policy, build_terms(cfg.loss), limits, episodes.dt, cfg.trainer.lr, seed=cfg.seed)


def train(cfg: DictConfig) -> dict:
    """Train one decoder as configured; returns a summary (run id, losses, timing)."""
    t0 = time.perf_counter()
    L.seed_everything(cfg.seed, workers=True, verbose=False)
    robot, episodes, train_s, val_s = prepare(cfg)
    L.seed_everything(cfg.seed, workers=True, verbose=False)  # weights do not depend on data-prep randomness
    system = build_system(cfg, robot, episodes, train_s)

    client, exp_id = tracking.client(cfg.tracking)
    model_name = cfg.get("label") or hydra.utils.get_class(cfg.model._target_).__name__
    if cfg.get("resume"):
        run_id, out = resume_target(client, str(cfg.resume), cfg)
    else:
        tags = {"coreach.stage": "train", "coreach.label": str(model_name), "coreach.dataset_sha256": episodes.fingerprint(),
                **robot_tags(robot)}
        if sweep_tag():
            tags["coreach.sweep"] = sweep_tag()
        commit = tracking.git_commit()
        if commit:
            tags["mlflow.source.git.commit"] = commit
        out = (output_dir() / str(model_name).replace("/", "_")).resolve()
        tags["coreach.output_dir"] = str(out)
        run = client.create_run(exp_id, run_name=cfg.get("run_name") or str(model_name), tags=tags)
        run_id = run.info.run_id
    try:
        summary = _fit_and_log(cfg, client, run_id, system, episodes, train_s, val_s, out)
    except SIGTERMException:
        client.set_tag(run_id, "coreach.preempted", "true")
        client.set_terminated(run_id, status="KILLED")
        print(
            f"coreach: training stopped by SIGTERM; checkpoints in {out / 'checkpoints'}; "
            f"continue with: coreach train resume={run_id} (and the same overrides)",
            file=sys.stderr,
        )
        raise SystemExit(143) from None
    except BaseException:
        client.set_terminated(run_id, status="FAILED")
        raise
    client.set_terminated(run_id)
    summary.update(run_id=run_id, experiment_id=exp_id, label=str(model_name), seconds=time.perf_counter() - t0)
    return summary


def run_params(cfg: DictConfig, episodes, train_s, val_s) -> dict[str, str]:
    params = tracking.flatten(cfg)
    params.pop("resume", None)
    params["dataset.fingerprint"] = episodes.fingerprint()
    params["dataset.episodes"] = str(len(episodes))
    params["dataset.train_samples"] = str(len(train_s))
    params["dataset.val_samples"] = str(len(val_s))
    for goal, a in (getattr(episodes, "arrival", None) or {}).items():  # the demonstrator's self-check
        params[f"dataset.arrival.{goal}"] = f"{a['rate']:.3f}"
    return params


def resume_target(client, run_id: str, cfg: DictConfig) -> tuple[str, Path]:
    """The run to continue and its output folder; refuses a run that cannot be continued as configured."""
    try:
        run = client.get_run(run_id)
    except MlflowException:
        raise ConfigError("option resume", f"no run {run_id!r} in {tracking.resolve_uri(cfg.tracking.get('uri'))}") from None
    if run.info.status == "FINISHED":
        raise ConfigError("option resume", f"run {run_id} already finished; nothing to resume")
    out = Path(run.data.tags.get("coreach.output_dir", ""))
    if not (out / "checkpoints" / "last.ckpt").exists():
        raise ConfigError("option resume", f"run {run_id} has no checkpoint at {out / 'checkpoints' / 'last.ckpt'}")
    logged = run.data.params
    now = tracking.flatten(cfg)
    now.pop("resume", None)
    differs = sorted(k for k, v in now.items() if k in logged and logged[k] != v)
    if differs:
        k = differs[0]
        raise ConfigError("option resume", f"config differs from run {run_id} at {k} ({logged[k]!r} was logged, now {now[k]!r}); resume with the same overrides")
    return run_id, out


class _CheckpointOnSigterm(L.Callback):
    """The cluster's SIGTERM: keep the partial epoch's weights too (checkpoints/preempted.ckpt). Resuming uses
    the last completed epoch (last.ckpt), which continues bit for bit like an uninterrupted run."""

    def __init__(self, folder: Path):
        self.folder = folder

    def on_exception(self, trainer, pl_module, exception):
        if isinstance(exception, SIGTERMException):
            trainer.save_checkpoint(self.folder / "preempted.ckpt")


def _fit_and_log(cfg, client, run_id, system, episodes, train_s, val_s, out: Path) -> dict:
    resuming = bool(cfg.get("resume"))
    if not resuming:
        tracking.log_params_batched(client, run_id, run_params(cfg, episodes, train_s, val_s))
        client.log_text(run_id, OmegaConf.to_yaml(cfg, resolve=True), "config.yaml")
        tracking.log_json(client, run_id, tracking.library_versions(), "environment/libraries.json")

    metric_logger = MlflowEpochLogger(client, run_id)
    # saved at the end of each training epoch, after the metric logger (checkpoint callbacks run last), so a
    # checkpoint's copy of the history always includes its own epoch
    checkpoint = ModelCheckpoint(
        dirpath=out / "checkpoints", monitor="val/loss", save_top_k=1, save_last=True, save_on_train_epoch_end=True
    )
    callbacks = [
        metric_logger,
        checkpoint,
        EarlyStopping(monitor="val/loss", patience=cfg.trainer.patience),
        _CheckpointOnSigterm(out / "checkpoints"),
    ]
    # Lightning sets its own loggers to INFO when imported, after the job's logging config: its accelerator
    # lines and product tips on every fit would bury coreach's own lines
    for name in ("lightning.pytorch", "lightning.fabric"):
        logging.getLogger(name).setLevel(logging.WARNING)
    trainer = L.Trainer(
        accelerator="cpu",
        devices=1,
        max_epochs=cfg.trainer.max_epochs,
        deterministic=True,
        logger=False,
        callbacks=callbacks + progress_callbacks(),
        enable_progress_bar=bool(progress_callbacks()),
        enable_model_summary=False,
        num_sanity_val_steps=0,
        default_root_dir=str(out),
    )
    data = DemoDataModule(train_s, val_s, cfg.data.batch_size, cfg.seed)
    trainer.fit(system, datamodule=data, ckpt_path=str(out / "checkpoints" / "last.ckpt") if resuming else None)

    best_path = checkpoint.best_model_path
    if best_path:
        state = torch.load(best_path, map_location="cpu", weights_only=True)["state_dict"]
        system.load_state_dict(state)
    policy = system.policy.eval()
    policy.set_stick_scale(train_s.context, train_s.action)

    stats = {
        "context_mean": policy.ctx_mean.tolist(),
        "context_std": policy.ctx_std.tolist(),
        "action_mean": policy.act_mean.tolist(),
        "action_std": policy.act_std.tolist(),
        "stick_scale": policy.stick_scale.tolist(),
    }
    tracking.log_json(client, run_id, stats, "normalisation.json")
    tracking.log_folder(client, run_id, policy.save, "decoder")

    best_epoch = min(range(len(metric_logger.history)), key=lambda i: metric_logger.history[i]["val/loss"])
    best = metric_logger.history[best_epoch]
    client.log_batch(run_id, metrics=[Metric(f"best/{k}", v, int(time.time() * 1000), 0) for k, v in best.items()])
    return {
        "best_epoch": best_epoch,
        "epochs": len(metric_logger.history),
        "val_loss": best["val/loss"],
        "metrics": best,
        "output_dir": str(out),
    }
