"""The conditions a participant drives, each as a runtime Session on the same arm and scene.

A bundle condition is the bundle's own Session (its ONNX decoder and its limits). The baselines (direct control,
policy blending) are the `interface` plugins the vetting loop compares decoders with, run inside a Session built
from the study's first bundle: same robot, goals, belief, safety filter and separation step, only the map from
stick to joint velocity differs. So a study compares interfaces, not two different sets of limits.
"""

from __future__ import annotations

from importlib.resources import files

import numpy as np
import torch
from omegaconf import OmegaConf

from coreach.errors import ConfigError
from coreach.host.registry import build_plugin
from coreach.runtime.session import Session
from coreach.vetting.records import LoopState


def baseline_interface(kind: str):
    """The shipped `interface` plugin `kind` (conf/coreach_conf/interface/<kind>.yaml), built and checked."""
    path = files("coreach_conf") / "interface" / f"{kind}.yaml"
    if not path.is_file():
        raise ConfigError(f"condition kind {kind!r}", "no such interface config; expected direct or blend")
    return build_plugin(OmegaConf.load(str(path)), "interface")


class BaselineSession(Session):
    """A Session whose decoder is an interface plugin (one episode at a time, torch on the lab computer).

    `mode` is the interface's current mode (direct control drives two of the six tool axes at a time);
    `switch_mode()` cycles it, as the participant's mode button does. The plugin sees the Session's own belief
    and layout, so blending blends toward the goal the Session believes in.
    """

    def __init__(self, base: Session, interface):
        super().__init__(base.manifest, base.chain, base._ort)
        self.interface = interface
        self.n_modes = int(getattr(interface, "n_modes", 1))
        self.mode = 0
        self.dt = 0.1  # set by the trial's control period (`start`)
        self._fresh = True

    def start(self, dt: float) -> None:
        """A new trial: belief uniform, mode 0, the plugin reset at its first step."""
        self.reset()
        self.dt, self.mode, self._fresh = float(dt), 0, True

    def switch_mode(self) -> int:
        self.mode = (self.mode + 1) % self.n_modes
        return self.mode

    def state(self, q, pos, rot, jac, context) -> LoopState:
        """The vetting loop's state for one episode at this step (float64 tensors)."""
        t = lambda a: torch.as_tensor(np.asarray(a, dtype=np.float64))[None]  # noqa: E731
        layout = self._layout
        return LoopState(0, t(q), t(pos), t(rot), t(jac), t(self._belief[0]), t(layout.targets[0]),
                         t(layout.goal_rot[0]), t(context[0]), torch.tensor([self.mode]), self.dt)  # fmt: skip

    def actions(self, sticks: np.ndarray, q, pos, rot, jac, context) -> np.ndarray:
        """Joint velocities [M, K, n] of every mode for sticks [K, d] at this state (the plugin's `act`)."""
        state = self.state(q, pos, rot, jac, context)
        if self._fresh:
            self.interface.reset(1, state)
            self._fresh = False
        with torch.no_grad():
            out = self.interface.act(torch.as_tensor(np.asarray(sticks, dtype=np.float64))[None], state)
        return out[0].numpy()

    def _preview(self, shaped, context, q, pos, rot, jac) -> np.ndarray:
        return self.actions(shaped, q, pos, rot, jac, context)

    def _decode(self, s, context, q, pos, rot, jac) -> np.ndarray:
        return self.actions(np.asarray(s, dtype=np.float64)[None], q, pos, rot, jac, context)[self.mode, 0]


def condition_session(condition: dict, folder, base: Session | None) -> Session:
    """The Session a participant drives for one condition: the bundle's own for a bundle condition
    (`folder`: its verified bundle folder), a BaselineSession on `base` for direct and blend."""
    if condition["kind"] == "bundle":
        return Session.open(folder)
    if base is None:
        raise ConfigError(f"condition {condition['name']}", "a baseline needs the arm, goals and limits of a "
                                                            "bundle; the study names no bundle condition")  # fmt: skip
    return BaselineSession(base, baseline_interface(condition["kind"]))
