"""One trial of a study on a test-drive Drive: the task's goal and its announced change, arrival, the time
limit, the recorded drive and the trial's figures.

The same code runs a person's trial (the page's server ticks the Drive at the control rate, the stick comes
from the page) and a simulated participant's (ticked as fast as it computes, on the Drive's own clock).
Arrival is `coreach.testdrive.sim.goal_progress`, the rule closed-loop vetting uses.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from coreach.testdrive.sim import Drive, goal_progress

# Safety-filter flags of a recorded step that count as the filter acting on the participant's command
FILTER_FLAGS = ("position_limited", "speed_capped", "separation_held")


@dataclass
class TrialSpec:
    """What a trial asks: reach `goal` (an index into the bundle's goals); with `switch_to`, the wanted goal
    changes `switch_at_s` seconds in. `time_limit_s` ends an unfinished trial as a failure."""

    step_id: str
    task: str
    goal: int
    switch_to: int | None
    switch_at_s: float | None
    time_limit_s: float
    practice: bool
    letter: str
    trial: int  # 1-based number among the block's trials of this kind (practice or measured)


@dataclass
class TrialRun:
    """A trial in progress: call `start`, then after every `drive.tick()` call `update`; `finished` says when
    it ended, `result()` gives its figures."""

    drive: Drive
    spec: TrialSpec
    wanted: int = 0
    phase: int = 0  # of the wanted goal: 0 seeking the approach pose, 1 the end of the fine motion, 2 arrived
    switched: bool = False
    success: bool = False
    time_s: float = math.nan
    finished: bool = False
    mode_switches: int = 0
    elapsed: float = 0.0
    rows: list = field(default_factory=list)

    def start(self) -> None:
        d = self.drive
        d.reset()
        start = getattr(d.session, "start", None)
        if start is not None:  # a baseline: mode 0 and the plugin reset for the new trial
            start(d.dt)
        self.wanted, self.phase = self.spec.goal, 0
        d.pick_target(self.wanted)
        d.start_recording()

    def switch_mode(self) -> None:
        switch = getattr(self.drive.session, "switch_mode", None)
        if switch is not None and not self.finished:
            switch()
            self.mode_switches += 1

    def update(self) -> None:
        """After a tick: the announced goal change, the wanted goal's progress, the end of the trial."""
        if self.finished:
            return
        d, s = self.drive, self.spec
        # a stepped clock sums dt: 30 x 0.1 falls short of 3.0 by an ulp, which must not cost a step
        self.elapsed = d.now() - d.t_reset + 1e-9
        if s.switch_to is not None and not self.switched and self.elapsed >= s.switch_at_s:
            self.switched, self.wanted, self.phase = True, s.switch_to, 0  # the new goal starts from its approach
            d.pick_target(self.wanted)
        pos, rot = d.session.chain.fk(d.q)
        self.phase = goal_progress(self.phase, pos, rot, d.targets[self.wanted], d.goal_rot[self.wanted],
                                   d.position_tol, d.orientation_tol)  # fmt: skip
        if self.phase == 2 and (s.switch_to is None or self.switched):
            self.success, self.time_s, self.finished = True, self.elapsed, True
        elif self.elapsed >= s.time_limit_s:
            self.finished = True

    def stop(self) -> list[dict]:
        """End the recording and hand over its rows (the caller saves them with the trial's metadata)."""
        d = self.drive
        with d._lock:
            rows, d._recording = d._recording or [], None
        self.rows = rows
        self.finished = True
        return rows

    def result(self) -> dict:
        """The trial's figures from its recorded rows (see `trial_figures`)."""
        return {"success": int(self.success), "time_s": round(self.time_s if self.success else self.elapsed, 3),
                "mode_switches": self.mode_switches, "switched": int(self.switched),
                **trial_figures(self.rows, self.drive)}  # fmt: skip


def trial_figures(rows: list[dict], drive: Drive) -> dict:
    """Path length of the tool (m), idle time (s: steps with no stick command, the stick released or no input),
    stick reversals (sign changes of a deflected axis, summed over axes), safety-filter activations (onsets
    of a step the position, speed or separation step limited) and the minimum separation to the furniture and
    to the person over the trial (m, the Session's own sphere model; nan without scene bodies)."""
    if not rows:
        return {"path_m": 0.0, "idle_s": 0.0, "reversals": 0, "filter_activations": 0,
                "min_furniture_m": math.nan, "min_person_m": math.nan, "steps": 0}  # fmt: skip
    pos = np.array([r["pos"] for r in rows])
    stick = np.array([r["stick"] for r in rows])  # as the Session used it: zero inside the deadband
    idle = np.all(stick == 0.0, axis=1)
    reversals = 0
    for axis in stick.T:
        signs = np.sign(axis[axis != 0.0])
        reversals += int(np.count_nonzero(signs[1:] != signs[:-1]))
    limited = np.array([any(r["flags"].get(k, False) for k in FILTER_FLAGS) or r["workspace_scale"] < 1.0
                        for r in rows])  # fmt: skip
    onsets = int(limited[0]) + int(np.count_nonzero(limited[1:] & ~limited[:-1]))
    out = {"path_m": round(float(np.linalg.norm(np.diff(pos, axis=0), axis=1).sum()), 4),
           "idle_s": round(float(idle.sum() * drive.dt), 3),
           "reversals": reversals, "filter_activations": onsets, "min_furniture_m": math.nan,
           "min_person_m": math.nan, "steps": len(rows)}  # fmt: skip
    arm = drive.session.arm
    if arm is not None:
        body_d = np.asarray(arm.geometry(np.array([r["q"] for r in rows]), grad=False).body_d)  # [T, S, O]
        n_f = len(arm.world.furniture)
        if n_f:
            out["min_furniture_m"] = float(body_d[..., :n_f].min())
        if body_d.shape[-1] > n_f:
            out["min_person_m"] = float(body_d[..., n_f:].min())
    return out
