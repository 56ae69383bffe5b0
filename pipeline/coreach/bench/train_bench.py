"""`coreach bench train`: training cost measured side by side in one run.

Two comparisons on the same samples, batch size, optimiser and epochs:
- Lightning against a bare PyTorch loop, both training the configured system (cVAE with the goal entropy term by
  default): what the Lightning loop around the system costs.
- the configured system against the same system without `bench.regulariser` (plain cVAE by default), both
  in the bare loop and both in Lightning: what the regulariser costs.
Each side is timed over the same number of epochs after a warm-up epoch; the sides run one after the other
within each round, in reverse order every other round, so drift on a shared machine hits all of them, and
the best round of each side counts.
"""

from __future__ import annotations

import copy
import resource
import time

import lightning as L
import torch
from omegaconf import DictConfig, OmegaConf

from coreach.errors import ConfigError
from coreach.training.data import DemoDataModule
from coreach.training.run import build_system, prepare

TARGET_LIGHTNING_OVER_BARE = 0.9  # throughput ratio
TARGET_REGULARISED_OVER_PLAIN = 2.0  # time ratio


def _peak_rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def _bare_epochs(system, data: DemoDataModule, epochs: int) -> float:
    opt = system.configure_optimizers()
    system.train()
    t0 = time.perf_counter()
    for _ in range(epochs):
        for batch in data.train_dataloader():
            tb = system.term_batch(batch)  # once per step, as DecoderSystem._step does, not once per term
            loss = sum(term.weight * term(tb) for term in system.terms)
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


def _without(cfg: DictConfig, term: str) -> DictConfig:
    """The same config with one loss term left out."""
    if term not in cfg.loss:
        raise ConfigError("bench.regulariser", f"{term!r} is not among the selected loss terms {list(cfg.loss)}")
    plain = copy.deepcopy(cfg)
    OmegaConf.set_struct(plain, False)
    del plain.loss[term]
    if not plain.loss:
        raise ConfigError("bench.regulariser", f"leaving out {term!r} leaves no loss term to train with")
    return plain


def run(cfg: DictConfig) -> dict:
    threads = cfg.bench.get("threads")
    if threads is not None:
        if not isinstance(threads, int) or isinstance(threads, bool) or threads < 1:
            raise ConfigError("bench.threads", f"expected an integer >= 1 or null, got {threads!r}")
        torch.set_num_threads(threads)
    regulariser = str(cfg.bench.regulariser)
    plain_cfg = _without(cfg, regulariser)
    L.seed_everything(cfg.seed, verbose=False)
    robot, episodes, train_s, val_s = prepare(cfg)
    # the same seed before each build: both systems start from the same decoder weights
    L.seed_everything(cfg.seed, verbose=False)
    base = build_system(cfg, robot, episodes, train_s)
    L.seed_everything(cfg.seed, verbose=False)
    plain = build_system(plain_cfg, robot, episodes, train_s)
    data = DemoDataModule(train_s, val_s, cfg.data.batch_size, cfg.seed)
    epochs, rounds = cfg.bench.epochs, cfg.bench.rounds
    _bare_epochs(copy.deepcopy(base), data, 1)  # warm-up: allocator, first-call overheads
    _bare_epochs(copy.deepcopy(plain), data, 1)
    sides = {
        "bare": lambda: _bare_epochs(copy.deepcopy(base), data, epochs),
        "lightning": lambda: _lightning_epochs(copy.deepcopy(base), data, epochs),
        "plain_bare": lambda: _bare_epochs(copy.deepcopy(plain), data, epochs),
        "plain_lightning": lambda: _lightning_epochs(copy.deepcopy(plain), data, epochs),
    }
    times: dict[str, list[float]] = {name: [] for name in sides}
    for r in range(rounds):
        for name in list(sides) if r % 2 == 0 else list(reversed(sides)):
            times[name].append(sides[name]())
    best = {name: min(t) for name, t in times.items()}
    samples = len(train_s) * epochs
    bare_rate = samples / best["bare"]
    light_rate = samples / best["lightning"]
    return {
        "model": cfg.model._target_,
        "loss_terms": list(cfg.loss.keys()),
        "regulariser": regulariser,
        "train_samples": len(train_s),
        "batch_size": cfg.data.batch_size,
        "epochs_per_round": epochs,
        "rounds": rounds,
        "bare_samples_per_s": bare_rate,
        "lightning_samples_per_s": light_rate,
        "ratio_lightning_over_bare": light_rate / bare_rate,
        "target_lightning_over_bare": TARGET_LIGHTNING_OVER_BARE,
        # seconds for epochs_per_round epochs, best round
        "plain_bare_s": best["plain_bare"],
        "regularised_bare_s": best["bare"],
        "ratio_regularised_over_plain_bare": best["bare"] / best["plain_bare"],
        "plain_lightning_s": best["plain_lightning"],
        "regularised_lightning_s": best["lightning"],
        "ratio_regularised_over_plain_lightning": best["lightning"] / best["plain_lightning"],
        "target_regularised_over_plain": TARGET_REGULARISED_OVER_PLAIN,
        "peak_rss_mb": _peak_rss_mb(),
        "torch_threads": torch.get_num_threads(),
    }
