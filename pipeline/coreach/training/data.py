"""Demonstrations -> training samples: replay each episode through the belief model and build contexts.

The belief model and context builder are the same objects vetting and the runtime use, so a decoder is
trained on exactly the contexts it will see in closed loop.
"""

from __future__ import annotations

from dataclasses import dataclass

import lightning as L
import numpy as np
import torch
from torch import Tensor
from torch.utils.data import DataLoader, Sampler

from coreach.context import build_context
from coreach.control.belief_tracker import track
from coreach.episodes import EpisodeSet
from coreach.world.geometry import quat_to_matrix


@dataclass
class Samples:
    """One row per demonstrated time step; raw units."""

    action: Tensor  # [N, n]
    context: Tensor  # [N, C]
    jac_lin: Tensor  # [N, 3, n]
    ee_pos: Tensor  # [N, 3]
    goal_targets: Tensor  # [N, G, 2, 3]
    belief: Tensor  # [N, G]
    episode: Tensor  # [N] episode id
    goal: Tensor  # [N] demonstrated goal index

    def __len__(self) -> int:
        return self.action.shape[0]

    def select(self, mask: Tensor) -> Samples:
        return Samples(**{k: v[mask] for k, v in self.__dict__.items()})

    def batch(self, idx) -> dict[str, Tensor]:
        idx = torch.as_tensor(idx)
        return {k: v[idx] for k, v in self.__dict__.items()}


def _padded(episodes, field: str, t_max: int) -> np.ndarray:
    """Stack a per-step field into [E, t_max, ...], repeating each episode's last row past its end."""
    rows = []
    for ep in episodes:
        x = getattr(ep, field)
        pad = np.repeat(x[-1:], t_max - len(x), axis=0)
        rows.append(np.concatenate([x, pad], axis=0))
    return np.stack(rows)


def replay(episodes: EpisodeSet, robot, belief_model, dtype=torch.float32) -> Samples:
    """Belief and context at every step of every episode, all episodes stepped together."""
    eps = episodes.episodes
    lengths = np.array([len(ep.q) for ep in eps])
    t_max = int(lengths.max())
    E, G = len(eps), len(episodes.goal_names)
    f64 = torch.float64
    q = torch.as_tensor(_padded(eps, "q", t_max), dtype=f64)  # [E, T, n]
    qd = torch.as_tensor(_padded(eps, "qd", t_max), dtype=f64)
    ee_pos = torch.as_tensor(_padded(eps, "ee_pos", t_max), dtype=f64)  # [E, T, 3]
    ee_rot = quat_to_matrix(torch.as_tensor(_padded(eps, "ee_quat", t_max), dtype=f64))  # [E, T, 3, 3]
    goal_pos = torch.as_tensor(np.stack([ep.goal_pos for ep in eps]), dtype=f64)  # [E, G, 3]
    goal_fine = torch.as_tensor(np.stack([ep.goal_fine for ep in eps]), dtype=f64)
    goal_rot = quat_to_matrix(torch.as_tensor(np.stack([ep.goal_quat for ep in eps]), dtype=f64))
    targets = torch.stack([goal_pos, goal_pos + goal_fine], dim=2)  # [E, G, 2, 3]

    belief = belief_model.initial(E, G, goal_pos[:, 0, 0])
    beliefs = [belief]
    anchor = ee_pos[:, 0]  # the cadence vetting and the runtime follow: update from the last update's pose
    for t in range(1, t_max):
        belief, anchor, _ = track(belief_model, belief, anchor, ee_pos[:, t], targets)
        beliefs.append(belief)
    belief_all = torch.stack(beliefs, dim=1)  # [E, T, G]

    valid = torch.as_tensor(np.arange(t_max)[None, :] < lengths[:, None])  # [E, T]
    n = q.shape[-1]
    flat_q = q[valid]  # [N, n]
    per_step = lambda x: x[:, None].expand(E, t_max, *x.shape[1:])[valid]  # noqa: E731
    context = build_context(
        flat_q, ee_pos[valid], ee_rot[valid], belief_all[valid], per_step(targets), per_step(goal_rot)
    )
    jac = robot.jacobian(flat_q)[:, :3, :]
    ids = torch.as_tensor([ep.episode_id for ep in eps])
    goals = torch.as_tensor([ep.goal for ep in eps])
    out = Samples(
        action=qd[valid],
        context=context,
        jac_lin=jac,
        ee_pos=ee_pos[valid],
        goal_targets=per_step(targets),
        belief=belief_all[valid],
        episode=per_step(ids),
        goal=per_step(goals),
    )
    assert out.action.shape[1] == n
    return Samples(**{k: (v.to(dtype) if v.is_floating_point() else v) for k, v in out.__dict__.items()})


def split_by_episode(samples: Samples, val_fraction: float, seed: int) -> tuple[Samples, Samples]:
    """Hold out whole episodes (never single time steps, which would leak near-duplicates into validation)."""
    ids = torch.unique(samples.episode)
    g = torch.Generator().manual_seed(seed)
    perm = ids[torch.randperm(len(ids), generator=g)]
    n_val = max(1, int(round(val_fraction * len(ids))))
    val_ids = perm[:n_val]
    is_val = torch.isin(samples.episode, val_ids)
    return samples.select(~is_val), samples.select(is_val)


class _Batches(torch.utils.data.Dataset):
    """Indexable by a list of rows, so a whole batch is gathered with one tensor index."""

    def __init__(self, samples: Samples):
        self.samples = samples

    def __len__(self) -> int:
        return len(self.samples)

    def __getitem__(self, idx):
        return self.samples.batch(idx)


class EpochBatches(Sampler):
    """Batches of row indices whose order depends only on (seed, epoch).

    Lightning calls set_epoch before every epoch, so a run resumed from a checkpoint sees exactly the batches
    an uninterrupted run would have seen.
    """

    def __init__(self, n: int, batch_size: int, seed: int, shuffle: bool):
        self.n, self.batch_size, self.seed, self.shuffle = n, batch_size, seed, shuffle
        self.epoch = 0

    def set_epoch(self, epoch: int) -> None:
        self.epoch = epoch

    def __len__(self) -> int:
        return (self.n + self.batch_size - 1) // self.batch_size

    def __iter__(self):
        if self.shuffle:
            g = torch.Generator().manual_seed(self.seed * 100_003 + self.epoch)
            order = torch.randperm(self.n, generator=g)
        else:
            order = torch.arange(self.n)
        yield from order.split(self.batch_size)


class DemoDataModule(L.LightningDataModule):
    """Train/validation loaders over pre-built samples; shuffling is seeded for reproducible runs."""

    def __init__(self, train: Samples, val: Samples, batch_size: int, seed: int):
        super().__init__()
        self.train, self.val = train, val
        self.batch_size, self.seed = batch_size, seed

    def _loader(self, samples: Samples, shuffle: bool) -> DataLoader:
        sampler = EpochBatches(len(samples), self.batch_size, self.seed, shuffle)
        return DataLoader(_Batches(samples), sampler=sampler, batch_size=None, num_workers=0)

    def train_dataloader(self) -> DataLoader:
        return self._loader(self.train, shuffle=True)

    def val_dataloader(self) -> DataLoader:
        return self._loader(self.val, shuffle=False)
