"""The contract of every plugin kind; built-in and third-party plugins are checked against it."""

from __future__ import annotations

import inspect
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Protocol, runtime_checkable

if TYPE_CHECKING:  # keep this module importable without torch (the runtime reads it)
    from torch import Tensor

    from coreach.episodes.episode_set import EpisodeSet  # the module itself: the package's loader reads Robot


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

    def stick_gain(self, state: Any) -> Tensor:
        """Smallest singular value [E] of d(joint velocity)/d(stick) at the current state (rad/s per unit
        stick), in the current mode: near zero means the stick barely moves the arm."""


@runtime_checkable
class Operator(Protocol):
    """A simulated user, batched over episodes: it picks one candidate (mode, stick) each step."""

    name: str

    def reset(self, n_episodes: int, generator: Any) -> None:
        """Start a batch of episodes; `generator` (torch.Generator) is the only source of randomness."""

    def choose(self, value: Tensor, step: int, generator: Any) -> Tensor:
        """Index [E] into the flattened M*K candidates (mode-major; -1 = no input, e.g. while a delayed
        operator has not reacted yet) given each candidate's value [E, M, K] for the
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


# ---------------------------------------------------------------------------------------------------------------
# Optional members. A plugin may leave these out; the host then falls back to the behaviour each docstring names.
# They live in protocols of their own because a runtime-checkable Protocol requires every member it declares.
# `coreach.host.contracts` checks each one a plugin does define.


class RobotOptional(Protocol):
    """What a robot may add to `Robot`."""

    def fk_and_jacobian(self, q: Tensor) -> tuple[Tensor, Tensor, Tensor]:
        """Position [B, 3], rotation [B, 3, 3] and Jacobian [B, 6, n] from one kinematics pass; the same values
        as `fk` and `jacobian`. Closed loops need both every step; without it they call the two separately."""

    def urdf_text(self) -> str | None:
        """The arm's URDF as text (what a release bundle ships as robot.urdf), or None for an arm that has no
        URDF; `coreach release` refuses such an arm with one line."""

    def link_model(self, clearance: float) -> Any:
        """The links as spheres (a `coreach.world.link_model.LinkModel`) for separation from the scene's bodies, with
        self-collision pairs at least `clearance` apart at home. Without it the arm has no bodies: vetting
        measures no separation and `coreach release` refuses the arm in a scene with bodies."""


class BeliefOptional(Protocol):
    """What a belief model may add to `BeliefModel`; a model without both cannot be released."""

    def to_manifest(self) -> dict[str, Any]:
        """The release manifest's `belief` section: {"model": <name>, **parameters}, plain JSON values. The
        name must be on the host's allow-list (`coreach.runtime.belief_manifest.BELIEF_MODELS`)."""

    @classmethod
    def from_manifest(cls, params: dict[str, Any]) -> Any:
        """Rebuild from a `to_manifest()` section without its "model" key; ValueError for unknown keys."""


class InterfaceOptional(Protocol):
    """What an interface may add to `Interface`."""

    switch_cost_steps: int
    """Control steps of no motion after the operator changes mode (multi-mode interfaces); 0 if absent. May be
    set in `reset`, which knows the control period."""


class OperatorOptional(Protocol):
    """What an operator may add to `Operator`."""

    mode_switch_margin: float
    """Extra one-step progress (m) another mode must promise before the operator switches to it; 0 if absent."""

    def reset(self, n_episodes: int, generator: Any, dt: float | None = None) -> None:
        """`Operator.reset` that also takes the control period `dt` (s) as a keyword, e.g. for band-limited
        tremor; the loop passes `dt=` only to operators whose `reset` has that parameter."""

    def vary(self, values: dict[str, Tensor]) -> None:
        """After `reset`: per-episode values {name: [E]} of the operator's own options (nan, or -1 for integers,
        = the operator's configured value). The loop calls it when a suite's cases set operator values; an
        operator without it cannot run such a suite (one line naming it)."""


OPTIONAL: dict[str, type] = {
    "robot": RobotOptional,
    "belief": BeliefOptional,
    "interface": InterfaceOptional,
    "operator": OperatorOptional,
}
"""Per kind, the protocol of its optional members (kinds not listed have none)."""


def optional_members(kind: str) -> list[str]:
    """Names of the optional members declared for `kind`."""
    proto = OPTIONAL.get(kind)
    if proto is None:
        return []
    names = set(getattr(proto, "__annotations__", {})) | {m for m in vars(proto) if not m.startswith("_")}
    return sorted(names)


def takes_dt(operator: Any) -> bool:
    """Whether `operator.reset` accepts the control period as the keyword `dt` (see `OperatorOptional.reset`)."""
    return "dt" in inspect.signature(operator.reset).parameters


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
