"""The training stage: config -> robot, demonstrations, belief replay -> Lightning fit -> MLflow run."""

from __future__ import annotations

import logging
import time
from pathlib import Path

import hydra
import lightning as L
import torch
from lightning.pytorch.callbacks import EarlyStopping, ModelCheckpoint
from mlflow.entities import Metric
from omegaconf import DictConfig, OmegaConf

from coreach import tracking
from coreach.context import ContextSpec
from coreach.plugin_registry import build_plugin, build_terms
from coreach.policy import DecoderPolicy
from coreach.safety import SafetyLimits
from coreach.training.callbacks import MlflowEpochLogger, progress_callbacks
from coreach.training.data import DemoDataModule, replay, split_by_episode
from coreach.training.system import DecoderSystem
from coreach.workdirs import output_dir, sweep_tag

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
    limits = SafetyLimits.for_robot(robot, cfg.safety.tcp_speed_max, cfg.safety.speed_fraction)
    return DecoderSystem(policy, build_terms(cfg.loss), limits, episodes.dt, cfg.trainer.lr)


def train(cfg: DictConfig) -> dict:
    """Train one decoder as configured; returns a summary (run id, losses, timing)."""
    t0 = time.perf_counter()
    L.seed_everything(cfg.seed, workers=True, verbose=False)
    robot, episodes, train_s, val_s = prepare(cfg)
    L.seed_everything(cfg.seed, workers=True, verbose=False)  # weights do not depend on data-prep randomness
    system = build_system(cfg, robot, episodes, train_s)

    client, exp_id = tracking.client(cfg.tracking)
    model_name = cfg.get("label") or hydra.utils.get_class(cfg.model._target_).__name__
    tags = {"coreach.stage": "train", "coreach.label": str(model_name), "coreach.dataset": episodes.fingerprint()}
    if sweep_tag():
        tags["coreach.sweep"] = sweep_tag()
    commit = tracking.git_commit()
    if commit:
        tags["mlflow.source.git.commit"] = commit
    run = client.create_run(exp_id, run_name=cfg.get("run_name") or str(model_name), tags=tags)
    run_id = run.info.run_id
    try:
        summary = _fit_and_log(cfg, client, run_id, system, episodes, train_s, val_s)
    except BaseException:
        client.set_terminated(run_id, status="FAILED")
        raise
    client.set_terminated(run_id)
    summary.update(run_id=run_id, experiment_id=exp_id, label=str(model_name), seconds=time.perf_counter() - t0)
    return summary


def _fit_and_log(cfg, client, run_id, system, episodes, train_s, val_s) -> dict:
    out = output_dir() / (cfg.get("label") or "train")
    params = tracking.flatten(cfg)
    params["dataset.fingerprint"] = episodes.fingerprint()
    params["dataset.episodes"] = str(len(episodes))
    params["dataset.train_samples"] = str(len(train_s))
    params["dataset.val_samples"] = str(len(val_s))
    tracking.log_params_batched(client, run_id, params)
    client.log_text(run_id, OmegaConf.to_yaml(cfg, resolve=True), "config.yaml")
    tracking.log_json(client, run_id, tracking.library_versions(), "environment/libraries.json")

    metric_logger = MlflowEpochLogger(client, run_id)
    checkpoint = ModelCheckpoint(dirpath=out / "checkpoints", monitor="val/loss", save_top_k=1, save_last=True)
    callbacks = [metric_logger, checkpoint, EarlyStopping(monitor="val/loss", patience=cfg.trainer.patience)]
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
    trainer.fit(system, datamodule=data)

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
