"""The contract of every plugin kind; built-in and third-party plugins are checked against it."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

if TYPE_CHECKING:  # keep this module importable without torch (the runtime reads it)
    import numpy as np
    from torch import Tensor

    from coreach.episodes import EpisodeSet
    from coreach.scenario import Scenario


@runtime_checkable
class Robot(Protocol):
    """A serial arm: limits and batched kinematics of its tool point, all in the base frame.

    Tensors are float32 or float64; outputs follow the dtype of `q`.
    """

    name: str
    joint_names: list[str]

    @property
    def dof(self) -> int:
        """Number of actuated joints n."""

    @property
    def q_lower(self) -> Tensor:
        """Lower joint position limits [n] (rad)."""

    @property
    def q_upper(self) -> Tensor:
        """Upper joint position limits [n] (rad)."""

    @property
    def qd_max(self) -> Tensor:
        """Joint speed limits [n] (rad/s), symmetric."""

    @property
    def q_home(self) -> Tensor:
        """Start configuration [n] used by demonstrations and suites unless they say otherwise."""

    def fk(self, q: Tensor) -> tuple[Tensor, Tensor]:
        """Tool pose for q [B, n]: position [B, 3] (m) and rotation matrix [B, 3, 3]."""

    def jacobian(self, q: Tensor) -> Tensor:
        """Geometric Jacobian [B, 6, n] at the tool point: rows 0-2 linear, 3-5 angular velocity."""


@runtime_checkable
class Dataset(Protocol):
    """A source of demonstrations in joint space."""

    def load(self, robot: Robot) -> EpisodeSet:
        """Return validated episodes for `robot`; raise DataError naming file/episode/column if bad."""


@runtime_checkable
class BeliefModel(Protocol):
    """Goal inference: a distribution over the G goals of a layout, updated from observed motion."""

    def initial(self, batch: int, n_goals: int, like: Any) -> Any:
        """Prior belief [B, G] (same array type and dtype as `like`)."""

    def update(self, belief: Any, ee_before: Any, ee_after: Any, goal_targets: Any) -> Any:
        """Posterior [B, G] after the tool moved from ee_before [B, 3] to ee_after [B, 3].

        goal_targets [B, G, S, 3] holds the S waypoints (approach point, end of fine motion) of each
        goal; works on numpy arrays and torch tensors alike so the runtime can share it.
        """


@dataclass
class Posterior:
    """What an encoder says about the latent of an action: a mean and, for stochastic encoders,
    a log-variance (None for deterministic ones such as `linear`)."""

    mean: Tensor
    logvar: Tensor | None = None


@runtime_checkable
class Decoder(Protocol):
    """A latent-action model on normalised actions and contexts; it never computes losses."""

    latent_dim: int
    context_blocks: tuple[str, ...]

    def encode(self, action: Tensor, context: Tensor) -> Posterior:
        """action [B, n], context [B, C] (only this decoder's blocks) -> Posterior over [B, latent_dim]."""

    def decode(self, latent: Tensor, context: Tensor) -> Tensor:
        """latent [B, latent_dim], context [B, C] -> normalised action [B, n]."""


@runtime_checkable
class LossTerm(Protocol):
    """One weighted term of the training objective; its value is logged under its own name."""

    name: str
    weight: float

    def __call__(self, batch: Any) -> Tensor:
        """Scalar loss (before weighting) for a `coreach.training.terms.TermBatch`."""


KINDS: dict[str, type] = {
    "robot": Robot,
    "dataset": Dataset,
    "belief": BeliefModel,
    "model": Decoder,
    "loss": LossTerm,
}
