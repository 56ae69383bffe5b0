"""`decoder` interface: a trained latent-action decoder, loaded from MLflow (run or registry) or a folder."""

from __future__ import annotations

import tempfile
from dataclasses import dataclass
from pathlib import Path

import torch
from torch import Tensor

from coreach.errors import ConfigError
from coreach_plugins.interface.direct import STICK_DIM, episode_sticks
from coreach.policy import DecoderPolicy

ARTIFACT = "decoder"  # artifact folder written by coreach.training.run
FILES = ("decoder.safetensors", "decoder.json")
WHERE = "option interface.run"


def _resolve_registry(client, ref: str) -> str:
    """Run id behind models:/<name>/<version> or models:/<name>@<alias>."""
    from mlflow.exceptions import MlflowException

    rest = ref[len("models:/") :]
    try:
        if "@" in rest:
            model, alias = rest.split("@", 1)
            version = client.get_model_version_by_alias(model, alias)
        elif "/" in rest:
            model, number = rest.rsplit("/", 1)
            version = client.get_model_version(model, number)
        else:
            raise ConfigError(WHERE, f"expected models:/<name>/<version> or models:/<name>@<alias>, got {ref!r}")
    except MlflowException as exc:
        raise ConfigError(WHERE, f"registered model {ref!r} not found in the tracking store ({_first_line(exc)})")
    if not version.run_id:
        raise ConfigError(WHERE, f"registered model {ref!r} is not linked to a run, so its decoder cannot be found")
    return str(version.run_id)


def _first_line(exc: Exception) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def load_policy(run: str) -> tuple[DecoderPolicy, str]:
    """The DecoderPolicy named by `run` (folder, run id or registry reference) and the run id or folder."""
    if not isinstance(run, str) or not run.strip() or run == "???":
        raise ConfigError(WHERE, "expected an MLflow run id, models:/<name>/<version>, models:/<name>@<alias> or a "
                          f"folder with {' + '.join(FILES)}; got {run!r}")  # fmt: skip
    folder = Path(run).expanduser()
    if folder.is_dir():
        missing = [f for f in FILES if not (folder / f).is_file()]
        if missing:
            raise ConfigError(f"{WHERE} ({folder})", f"folder lacks {missing}; expected a decoder saved by coreach")
        return DecoderPolicy.load(folder), str(folder)
    if not run.startswith("models:/") and ("/" in run or "\\" in run or run.startswith((".", "~"))):
        raise ConfigError(f"{WHERE} ({run})", "no such folder (run ids have no slashes)")

    from mlflow.exceptions import MlflowException
    from mlflow.tracking import MlflowClient

    from coreach.tracking import resolve_uri

    uri = resolve_uri(None)
    client = MlflowClient(tracking_uri=uri)
    run_id = _resolve_registry(client, run) if run.startswith("models:/") else run
    try:
        client.get_run(run_id)
    except MlflowException as exc:
        raise ConfigError(WHERE, f"run {run_id!r} not found in the tracking store {uri} ({_first_line(exc)})")
    with tempfile.TemporaryDirectory() as tmp:
        try:
            local = Path(client.download_artifacts(run_id, ARTIFACT, tmp))
        except Exception as exc:  # stores differ in what they raise for a missing artifact
            raise ConfigError(WHERE, f"run {run_id!r} has no {ARTIFACT}/ artifact ({_first_line(exc)}); "
                              "was it logged by coreach train?")  # fmt: skip
        if not all((local / f).is_file() for f in FILES):
            raise ConfigError(WHERE, f"run {run_id!r}: artifact {ARTIFACT}/ lacks {' or '.join(FILES)}")
        return DecoderPolicy.load(local), run_id  # tensors are read into memory before tmp goes


class DecoderInterface:
    """stick [K, 2] (or [E, K, 2]) -> policy(stick, context) in every episode; one mode. `run`: MLflow run id,
    models:/<name>/<version>, models:/<name>@<alias>, or a local folder holding decoder.safetensors and
    decoder.json. The store is coreach.tracking.resolve_uri's (COREACH_TRACKING_URI, MLFLOW_TRACKING_URI, else
    ./mlflow.db)."""

    n_modes = 1

    def __init__(self, run: str = "???", name: str = ""):
        self.run = run
        policy, self.source_ = load_policy(run)
        self._setup(policy, name or _label(run))

    @classmethod
    def from_policy(cls, policy: DecoderPolicy, name: str = "decoder") -> DecoderInterface:
        """Wrap a policy already in memory (tests, the release stage)."""
        self = cls.__new__(cls)
        self.run, self.source_ = "", "memory"
        self._setup(policy, name)
        return self

    def _setup(self, policy: DecoderPolicy, name: str) -> None:
        if policy.latent_dim != STICK_DIM:
            raise ConfigError(
                f"interface {name}", f"decoder has a {policy.latent_dim}-D latent; a {STICK_DIM}-axis stick needs 2"
            )
        self.policy_ = policy.eval()
        self.name = str(name)
        self.dtype_ = next(policy.parameters()).dtype

    def _context(self, state) -> Tensor:
        width = self.policy_.spec.width
        if state.context.shape[-1] != width:
            spec = self.policy_.spec
            raise ConfigError(
                f"interface {self.name}",
                f"decoder was trained for {spec.dof} joints and {spec.n_goals} goals (context width {width}); "
                f"the suite gives context width {state.context.shape[-1]}",
            )
        return state.context.to(self.dtype_)

    def reset(self, n_episodes: int, state) -> None:
        self._context(state)

    def act(self, stick: Tensor, state) -> Tensor:
        ctx = self._context(state)  # [E, C]
        E, C = ctx.shape
        sticks = episode_sticks(stick, E, f"interface {self.name}").to(self.dtype_)  # [E, K, 2]
        with torch.no_grad():
            # One forward over all E*K (episode, candidate) pairs; expand is free, the policy flattens.
            qd = self.policy_(sticks, ctx[:, None].expand(E, sticks.shape[1], C))
        return qd[:, None].to(state.context.dtype)  # [E, 1, K, n]

    def stick_jacobian(self, context: Tensor, stick: Tensor | None = None) -> Tensor:
        """d qd / d stick [E, n, 2] at context [E, C] (raw), at the centre of the stick box by default."""
        ctx = context.to(self.dtype_)
        s = torch.zeros(ctx.shape[0], STICK_DIM, dtype=self.dtype_) if stick is None else stick.to(self.dtype_)
        s = s.detach().requires_grad_(True)
        with torch.enable_grad():
            qd = self.policy_(s, ctx)  # [E, n]
            # Episodes are independent rows, so the gradient of a column's sum is that column's row-wise
            # derivative: n backward passes over the whole batch. Plain autograd on purpose: torch.func's
            # first call costs seconds of set-up, and a per-episode vmap is slower on CPU.
            rows = [torch.autograd.grad(qd[:, i].sum(), s, retain_graph=i < qd.shape[1] - 1)[0]
                    for i in range(qd.shape[1])]  # fmt: skip
        return torch.stack(rows, dim=1)

    def stick_gain(self, state) -> Tensor:
        # At the stick's centre: for a nonlinear decoder the gain varies over the box, and the centre is where
        # every motion starts from.
        jac = self.stick_jacobian(self._context(state)).detach()
        return torch.linalg.svdvals(jac)[..., -1].to(state.context.dtype)


def _label(run: str) -> str:
    if run.startswith("models:/"):
        return run[len("models:/") :]
    if Path(run).expanduser().is_dir():
        return Path(run).expanduser().resolve().name
    return f"decoder-{run[:8]}"


@dataclass
class DecoderInterfaceConfig:
    """Options of `decoder` (conf/interface/decoder.yaml)."""

    _target_: str = "coreach_plugins.interface.decoder.DecoderInterface"
    run: str = "???"
    name: str = ""
