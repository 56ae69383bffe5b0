"""`coreach bench train`: Lightning training throughput against a bare PyTorch loop, measured in one run.

Both sides train the same system (entropy-regularised cVAE by default) on the same samples with the same batch
size and optimiser; only the loop around it differs. Each side is timed over the same number of epochs after
a warm-up epoch, alternating sides so drift on a shared machine hits both.
"""

from __future__ import annotations

import copy
import resource
import time

import lightning as L
import torch
from omegaconf import DictConfig

from coreach.training.data import DemoDataModule
from coreach.training.run import build_system, prepare


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _bare_epochs(system, data: DemoDataModule, epochs: int) -> float:
    opt = system.configure_optimizers()
    system.train()
    t0 = time.perf_counter()
    for _ in range(epochs):
        for batch in data.train_dataloader():
            loss = sum(term.weight * term(system.term_batch(batch)) for term in system.terms)
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
    return time.perf_counter() - t0


def _lightning_epochs(system, data: DemoDataModule, epochs: int) -> float:
    trainer = L.Trainer(
        accelerator="cpu",
        devices=1,
        max_epochs=epochs,
        logger=False,
        enable_checkpointing=False,
        enable_progress_bar=False,
        enable_model_summary=False,
        limit_val_batches=0,
        num_sanity_val_steps=0,
    )
    t0 = time.perf_counter()
    trainer.fit(system, train_dataloaders=data.train_dataloader())
    return time.perf_counter() - t0


def run(cfg: DictConfig) -> dict:
    L.seed_everything(cfg.seed, verbose=False)
    robot, episodes, train_s, val_s = prepare(cfg)
    base = build_system(cfg, robot, episodes, train_s)
    data = DemoDataModule(train_s, val_s, cfg.data.batch_size, cfg.seed)
    epochs, rounds = cfg.bench.epochs, cfg.bench.rounds
    _bare_epochs(copy.deepcopy(base), data, 1)  # warm-up: allocator, first-call overheads
    bare, light = [], []
    for _ in range(rounds):
        bare.append(_bare_epochs(copy.deepcopy(base), data, epochs))
        light.append(_lightning_epochs(copy.deepcopy(base), data, epochs))
    samples = len(train_s) * epochs
    bare_rate = samples / min(bare)
    light_rate = samples / min(light)
    return {
        "model": cfg.model._target_,
        "loss_terms": list(cfg.loss.keys()),
        "train_samples": len(train_s),
        "batch_size": cfg.data.batch_size,
        "epochs_per_round": epochs,
        "rounds": rounds,
        "bare_samples_per_s": bare_rate,
        "lightning_samples_per_s": light_rate,
        "ratio_lightning_over_bare": light_rate / bare_rate,
        "goal_ratio": 0.9,
        "peak_rss_mb": _peak_rss_mb(),
        "torch_threads": torch.get_num_threads(),
    }
