"""The simulated arm a participant drives in a study: the conditions' Sessions on the bundles' scene, one Drive
per condition block, and the trial's recorded drive saved with its metadata.

Shared by `coreach study session` (a person, the page, real time) and `coreach study simulate` (simulated
participants, headless, on a stepped clock).
"""

from __future__ import annotations

from pathlib import Path

from coreach.errors import ConfigError
from coreach.release.bundle_store import bundle_folder
from coreach.runtime.bundle import verify_bundle
from coreach.runtime.session import Session
from coreach.study.baselines import condition_session
from coreach.study.files import private_folder
from coreach.study.plan import check_vetted
from coreach.study.session import DRIVES, Step, StudySession
from coreach.study.trial import TrialRun, TrialSpec
from coreach.testdrive.recording import save_drive
from coreach.testdrive.sim import Drive

TIME_LIMIT_S = 30.0  # a trial not finished by then ends as a failure (the study config's trial_time_limit_s)


def resolve_bundles(plan: dict, where: str = "study", uri: str | None = None) -> dict[str, Path]:
    """Each bundle condition's verified folder (a registry reference is resolved now, at the session). A
    bundle released with gate settings looser than shipped is refused unless the plan is a pilot, and every
    bundle must know the tasks' goals and share the first bundle's robot and goals (baselines run on it)."""
    out: dict[str, Path] = {}
    goals = {t["goal"] for t in plan["tasks"]} | {t["switch_to"] for t in plan["tasks"] if t.get("switch_to")}
    first = None
    for c in plan["conditions"]:
        if c["kind"] != "bundle":
            continue
        at = f"{where} condition {c['name']} ({c['ref']})"
        folder = bundle_folder(c["ref"], at, uri)
        check_vetted(folder, at, plan["pilot"])
        m = verify_bundle(folder)
        missing = sorted(goals - set(m.goal_names))
        if missing:
            raise ConfigError(at, f"the bundle has no goal {', '.join(missing)} (its goals: {', '.join(m.goal_names)})")
        if first is None:
            first = m
        elif (list(m.goal_names), m.robot_name) != (list(first.goal_names), first.robot_name):
            raise ConfigError(at, f"robot {m.robot_name} with goals {list(m.goal_names)} differs from the first "
                                  f"bundle's ({first.robot_name}, {list(first.goal_names)})")  # fmt: skip
        out[c["name"]] = folder
    if not out:
        raise ConfigError(f"{where}.conditions", "no bundle condition: a session needs a bundle's arm, goals and "
                                                 "limits (the baselines run on the first bundle's)")  # fmt: skip
    return out


class Rig:
    """The conditions of one participant's session, each on its own Drive, all on one clock."""

    def __init__(self, session: StudySession, bundles: dict[str, Path], rate_hz: float, clock,
                 position_tol: float = 0.02, orientation_tol_deg: float = 15.0):  # fmt: skip
        self.session, self.bundles, self.rate_hz, self.clock = session, bundles, float(rate_hz), clock
        self.position_tol, self.orientation_tol_deg = position_tol, orientation_tol_deg
        self.by_letter = {c["letter"]: c for c in session.plan["conditions"]}
        self._drives: dict[str, Drive] = {}
        self._base = None
        cfg = session.plan["config"]
        self.time_limit_s = float(cfg.get("trial_time_limit_s") or TIME_LIMIT_S)

    def drive(self, letter: str) -> Drive:
        """The Drive of a condition (built on first use: one ONNX session per condition, not per trial)."""
        if letter not in self._drives:
            if self._base is None:
                self._base = Session.open(next(iter(self.bundles.values())))
            c = self.by_letter[letter]
            session = condition_session(c, self.bundles.get(c["name"]), self._base)
            self._drives[letter] = Drive(session, self.rate_hz, self.position_tol, self.orientation_tol_deg,
                                         self.session.folder / DRIVES, clock=self.clock)  # fmt: skip
        return self._drives[letter]

    def trial(self, step: Step) -> TrialRun:
        """A TrialRun for a trial step (not started)."""
        d = self.drive(step.letter)
        names = list(d.manifest.goal_names)
        task = self.session.task_of(step)
        spec = TrialSpec(step.id, step.task, names.index(task["goal"]),
                         names.index(task["switch_to"]) if task.get("switch_to") else None, task.get("switch_at_s"),
                         self.time_limit_s, step.practice, step.letter, step.trial)  # fmt: skip
        return TrialRun(d, spec)

    def save(self, run: TrialRun) -> str | None:
        """The trial's recorded drive as an episode file in the session's drives/ folder (None: too short to be
        an episode). Its metadata names the study, plan hash, code, condition letter, task and trial."""
        rows = run.rows
        if len(rows) < 2:
            return None
        s, sess = run.spec, self.session
        meta = {"study": {"name": sess.plan["name"], "version": sess.version, "plan_sha256": sess.sha256,
                          "participant": sess.code, "condition": s.letter, "task": s.task, "trial": s.trial,
                          "practice": s.practice, "success": bool(run.success)}}  # fmt: skip
        path = private_folder(sess.folder / DRIVES) / f"{s.step_id}.parquet"
        save_drive(run.drive, rows, run.wanted, int(s.trial), path, extra_meta=meta)
        return f"{DRIVES}/{path.name}"
