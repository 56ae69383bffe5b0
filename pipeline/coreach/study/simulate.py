"""`coreach study simulate`: the frozen plan with simulated participants, headless, through the session code.

Every participant goes through a StudySession (consent, practice, trials, forms, ranking, written after every
step) on a Rig (the conditions' Sessions and Drives), ticked on a stepped clock instead of the wall clock. The
simulated sessions live in <study>/v<N>/simulation/, apart from real participants' sessions/, and are
analysed by the same analysis into simulation/analysis/.
"""

from __future__ import annotations

import json
import shutil
import time
from pathlib import Path

import numpy as np

from coreach.study.analyze import run_analysis
from coreach.study.files import private_folder, write_private
from coreach.study.participant import SimulatedParticipant, draw_values
from coreach.study.plan import PLAN_FILE, SESSIONS, latest_folder, read_plan
from coreach.study.rig import Rig, resolve_bundles
from coreach.study.session import SessionLock, StudySession

SIMULATION = "simulation"  # <study>/v<N>/simulation/: a copy of the plan, simulated sessions, their analysis


class SteppedClock:
    """A clock that moves only when told: simulated time, as fast as the computer steps it."""

    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t

    def advance(self, dt: float) -> None:
        self.t += dt


def run_trial(rig: Rig, session: StudySession, step, person: SimulatedParticipant, clock: SteppedClock) -> dict:
    """One trial by a simulated participant: begin (written), drive until arrival or the time limit, save."""
    run = rig.trial(step)
    session.begin_trial(step.id)
    run.start()
    d = run.drive
    person.begin(d.dt)
    while not run.finished:
        d.set_stick(person.act(run), "simulated")
        d.tick()
        clock.advance(d.dt)
        run.update()
    run.stop()
    result = run.result()
    session.end_trial(step.id, result, rig.save(run))
    if not step.practice:
        person.remember(step.letter, result["success"], result["time_s"])
    return result


def simulate_participant(folder: Path, document: dict, code: str, bundles: dict, rate_hz: float,
                         seed: int) -> dict:  # fmt: skip
    """Run (or resume) one simulated participant's whole session; returns what they drew and did."""
    session = StudySession(folder, document, code)
    with SessionLock(session.folder):
        clock = SteppedClock()
        rig = Rig(session, bundles, rate_hz, clock)
        rng = np.random.default_rng(seed)
        person = SimulatedParticipant(draw_values(document["plan"]["config"]["population"], rng), seed)
        trials = 0
        while (step := session.current()) is not None:
            if step.kind == "consent":
                session.consent()  # a simulated participant: the protocol's step, run as the page would
            elif step.kind == "trial":
                run_trial(rig, session, step, person, clock)
                trials += 1
            elif step.kind == "tlx":
                session.answer_tlx(step.id, person.tlx(step.letter))
            elif step.kind == "liking":
                session.answer_liking(step.id, person.liking(step.letter))
            else:
                session.answer_ranking(person.ranking(session.letters))
    return {"code": code, "values": person.values, "trials": trials}


def simulate_study(root: Path, name: str, version: int | None = None, participants: int | None = None,
                   fresh: bool = False, rate_hz: float | None = None, uri: str | None = None,
                   progress=None, warn=print) -> dict:  # fmt: skip
    """Simulate the plan's participants (the first `participants` codes, default all) and analyse them."""
    real = latest_folder(Path(root), name, version)
    document = read_plan(real / PLAN_FILE)
    plan = document["plan"]
    folder = real / SIMULATION
    if fresh and folder.exists():
        shutil.rmtree(folder)
    private_folder(folder)
    write_private(folder / PLAN_FILE, (real / PLAN_FILE).read_bytes())  # the plan the simulation ran
    bundles = resolve_bundles(plan, uri=uri)
    rate = float(rate_hz or plan["config"].get("simulate_rate_hz") or 10.0)
    codes = [p["code"] for p in plan["participants"]][: participants or None]
    started = time.perf_counter()
    people = []
    for i, code in enumerate(codes):
        people.append(simulate_participant(folder, document, code, bundles, rate, int(plan["config"]["seed"]) + 7919 * (i + 1)))
        if progress is not None:
            progress(i + 1, len(codes))
    drove = time.perf_counter() - started
    summary = run_analysis(root, name, version=document["version"], out=folder / "analysis", uri=uri, warn=warn,
                           trials=sorted((folder / SESSIONS).glob("*/trials.csv")))  # fmt: skip
    write_private(folder / "participants.json", json.dumps(people, indent=2) + "\n")
    return {**summary, "simulated": len(people), "folder": str(folder), "seconds_driving": round(drove, 1),
            "seconds_total": round(time.perf_counter() - started, 1), "rate_hz": rate}  # fmt: skip
