"""Example outside plugin: penalise the size of decoded actions (an effort regulariser)."""

from __future__ import annotations


class Effort:
    """Mean squared decoded action (normalised units): prefers gentle commands for the same reconstruction."""

    name = "effort"

    def __init__(self, weight: float = 0.01):
        self.weight = float(weight)

    def __call__(self, batch):
        return batch.reconstruction.pow(2).sum(dim=-1).mean()
