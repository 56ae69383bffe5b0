"""The training command's own options (seed, data split, trainer), with types and ranges checked at compose time."""

from __future__ import annotations

from dataclasses import dataclass

from coreach.config.option_specs import integer, number


@dataclass
class RunOptions:
    seed: int = integer(0, 0, " (training seeds are small non-negative integers)")


@dataclass
class DataOptions:
    val_fraction: float = number(0.2, 0.0, 1.0, "(share of episodes)", open_range=True)
    batch_size: int = integer(256, 1)


@dataclass
class TrainerOptions:
    max_epochs: int = integer(30, 1)
    lr: float = number(1e-3, 0.0, 10.0, open_range=True)
    patience: int = integer(8, 0, " (epochs without improvement before stopping)")


# where each block sits in a composed config ("" = top level); a block absent from a config is not checked
TRAINING_OPTIONS = (("", RunOptions), ("data", DataOptions), ("trainer", TrainerOptions))
