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


@runtime_checkable
class Interface(Protocol):
    """What maps the stick to the robot in closed loop: a trained decoder or a baseline, batched.

    An interface may have several modes (direct control switches between axis pairs); the simulated operator
    evaluates candidate sticks in every mode and pays a time cost when it changes mode.
    """

    name: str

    @property
    def n_modes(self) -> int:
        """Number of modes the operator can choose among (1 for decoders)."""

    def reset(self, n_episodes: int, state: Any) -> None:
        """Start a batch of episodes (`coreach.vetting.records.LoopState` at step 0)."""

    def act(self, stick: Tensor, state: Any) -> Tensor:
        """Joint velocities [E, M, K, n] (rad/s, before safety limits) for candidate sticks [K, d] in each
        of the M modes, in every episode's current state."""

    def authority(self, state: Any) -> Tensor:
        """Smallest singular value [E] of d(joint velocity)/d(stick) at the current state (rad/s per unit
        stick), in the current mode: near zero means the stick barely moves the arm."""


@runtime_checkable
class Operator(Protocol):
    """A simulated user, batched over episodes: it picks one candidate (mode, stick) each step."""

    name: str

    def reset(self, n_episodes: int, generator: Any) -> None:
        """Start a batch of episodes; `generator` (torch.Generator) is the only source of randomness."""

    def choose(self, value: Tensor, step: int, generator: Any) -> Tensor:
        """Index [E] into the flattened M*K candidates given each candidate's value [E, M, K] for the
        operator's current goal (progress toward it after the interface's action and the safety limits)."""

    def perturb(self, stick: Tensor, step: int, generator: Any) -> Tensor:
        """The stick [E, d] actually sent after the choice (bias, tremor); identity for an ideal user."""


@runtime_checkable
class Labeller(Protocol):
    """Who says what the right action was at states closed loop visited (data aggregation): the scripted
    demonstrator, or later a lab's recorded corrections."""

    name: str

    def label(self, robot: Robot, visits: Any) -> Tensor:
        """Joint velocities [N, n] (rad/s) for the N states of a `coreach.aggregation.visits.Visits`, each
        toward the goal the operator wanted at that state."""


KINDS: dict[str, type] = {
    "robot": Robot,
    "dataset": Dataset,
    "belief": BeliefModel,
    "model": Decoder,
    "loss": LossTerm,
    "interface": Interface,
    "operator": Operator,
    "labeller": Labeller,
}
