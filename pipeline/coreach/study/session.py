"""One participant's session of a frozen study plan: the steps in order, what is done, and resuming.

The steps come from the plan alone: consent, then per condition block (shown as its letter) the practice
trials, the measured trials in the block's task order, the raw NASA-TLX and the liking question, and at the end
the ranking of the interfaces. After every step the session's state is written whole (temporary file, rename)
to <study>/v<N>/sessions/<code>/state.json, with the trial table rebuilt beside it, so a reload, a closed lid
or a killed server loses at most the trial in progress. That trial is marked incomplete when the session is
next opened, and the participant goes on with the next unfinished step.

Consent: the experimenter confirms that the participant's informed consent was recorded (on the lab's own
forms, as the ethics review requires); only that fact and its time are stored here. Nothing stores a name, an
IP address or browser details.
"""

from __future__ import annotations

import csv
import io
import json
import os
import time
from dataclasses import dataclass
from pathlib import Path

from coreach.errors import ConfigError, DataError
from coreach.release.settle import process_running
from coreach.study.files import private_folder, write_private
from coreach.study.plan import PLAN_FILE, SESSIONS, latest_folder, plan_hash, read_plan
from coreach.study.tlx import COLUMNS as TLX_COLUMNS, SUBSCALES, raw_tlx

STATE_FORMAT = "coreach-study-session/1"
STATE_FILE, TRIALS_FILE, RESPONSES_FILE, DRIVES = "state.json", "trials.csv", "responses.json", "drives"
LIKING = (1, 7)  # "I would use this interface again": 1 strongly disagree .. 7 strongly agree
COMMENT_MAX = 500  # characters of an optional comment (free text: left out of `coreach study export`)
TRIAL_COLUMNS = ("participant", "condition", "task", "trial", "practice", "complete", "success", "time_s", "path_m",
                 "idle_s", "reversals", "mode_switches", "filter_activations", "min_furniture_m", "min_person_m",
                 "switched", *TLX_COLUMNS, "liking", "preference")  # fmt: skip


def now_text() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%S%z")


@dataclass(frozen=True)
class Step:
    """One thing the participant (or the experimenter, for consent) does. kind: consent, trial, tlx, liking,
    ranking."""

    id: str
    kind: str
    letter: str | None = None
    task: str | None = None
    trial: int = 0  # 1-based: the practice trial's number, or the measured trial's repeat of its task
    practice: bool = False
    index: int = 0  # position among the block's trials (practice first), for "trial n of N"
    total: int = 0


def steps_of(person: dict) -> list[Step]:
    """The participant's steps, in order, from their plan entry."""
    out = [Step("consent", "consent")]
    for block in person["blocks"]:
        L, order = block["letter"], block["task_order"]
        n_practice = int(block["practice_trials"])
        total = n_practice + len(block["trials"])
        for p in range(n_practice):
            out.append(Step(f"{L}-practice-{p + 1}", "trial", L, order[p % len(order)], p + 1, True, p + 1, total))
        for i, t in enumerate(block["trials"]):
            out.append(Step(f"{L}-{t['task']}-{t['repeat']}", "trial", L, t["task"], int(t["repeat"]), False,
                            n_practice + i + 1, total))  # fmt: skip
        out += [Step(f"tlx-{L}", "tlx", L), Step(f"liking-{L}", "liking", L)]
    out.append(Step("ranking", "ranking"))
    return out


class StudySession:
    """Open with `StudySession.open(root, name, code)`; `current()` is the next step; `begin_trial`,
    `end_trial`, `consent`, `answer_tlx`, `answer_liking`, `answer_ranking` complete steps in order."""

    def __init__(self, folder: Path, document: dict, code: str):
        self.plan, self.version, self.sha256 = document["plan"], document["version"], document["sha256"]
        person = next((p for p in self.plan["participants"] if p["code"] == code), None)
        if person is None:
            raise ConfigError(f"participant {code!r}", f"not a code of study {self.plan['name']} "
                                                       f"v{self.version}; see the plan's participant codes")  # fmt: skip
        self.code, self.person = code, person
        self.version_folder = folder
        self.folder = folder / SESSIONS / code
        self.steps = steps_of(person)
        self._by_id = {s.id: s for s in self.steps}
        self.letters = list(person["order"])
        self.tasks = {t["name"]: t for t in self.plan["tasks"]}
        self.state = self._load()
        self.resumed_incomplete: str | None = None
        if self.state.get("in_progress"):
            self._mark_incomplete(self.state["in_progress"], "the session stopped during this trial")

    @classmethod
    def open(cls, root: Path, name: str, code: str, version: int | None = None) -> StudySession:
        folder = latest_folder(Path(root), name, version)
        document = read_plan(folder / PLAN_FILE)
        if plan_hash(document["plan"]) != document["sha256"]:  # read_plan checks it too; the state relies on it
            raise ConfigError(str(folder / PLAN_FILE), "the plan does not match its sha256")
        withdrawn = folder / "withdrawn.json"
        if withdrawn.is_file() and code in json.loads(withdrawn.read_text(encoding="utf-8")).get("codes", {}):
            raise ConfigError(f"participant {code}", "withdrew from the study; their data was deleted and the code "
                                                     "is not used again")  # fmt: skip
        return cls(folder, document, code)

    # ------------------------------------------------------------------------------------------ state
    def _load(self) -> dict:
        path = self.folder / STATE_FILE
        if not path.is_file():
            return {"format": STATE_FORMAT, "study": self.plan["name"], "version": self.version,
                    "plan_sha256": self.sha256, "code": self.code, "created_at": now_text(), "consent_at": None,
                    "done": {}, "in_progress": None}  # fmt: skip
        try:
            state = json.loads(path.read_text(encoding="utf-8"))
            done, fmt = state["done"], state["format"]
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise DataError(str(path), f"not a readable session state ({type(exc).__name__}: {exc})") from None
        if fmt != STATE_FORMAT or not isinstance(done, dict):
            raise DataError(str(path), f"format {fmt!r}; expected {STATE_FORMAT}")
        if state.get("plan_sha256") != self.sha256:
            raise ConfigError(str(path), f"this session ran under plan sha256 {str(state.get('plan_sha256'))[:12]}..., "
                                         f"not the plan now at v{self.version} ({self.sha256[:12]}...); the plan "
                                         "was changed after sessions started")  # fmt: skip
        return state

    def save(self) -> None:
        """The state, then the tables derived from it, each written whole."""
        private_folder(self.folder)
        write_private(self.folder / STATE_FILE, json.dumps(self.state, indent=2, allow_nan=True) + "\n")
        write_private(self.folder / TRIALS_FILE, self.trials_csv())
        write_private(self.folder / RESPONSES_FILE, json.dumps(self.responses(), indent=2) + "\n")

    @property
    def started(self) -> bool:
        return (self.folder / STATE_FILE).is_file()

    # ------------------------------------------------------------------------------------------ steps
    def current(self) -> Step | None:
        """The next step not yet done (None: the session is complete)."""
        done = self.state["done"]
        return next((s for s in self.steps if s.id not in done), None)

    def progress(self) -> tuple[int, int]:
        return len(self.state["done"]), len(self.steps)

    def _expect(self, step_id: str, kind: str) -> Step:
        step = self.current()
        if step is None:
            raise ConfigError(f"participant {self.code}", "the session is complete; nothing more to record")
        if step.id != step_id or step.kind != kind:
            raise ConfigError(f"participant {self.code}", f"step {step_id!r} ({kind}) is not the next one; the next is "
                                                          f"{step.id!r} ({step.kind})")  # fmt: skip
        return step

    def consent(self) -> None:
        """The experimenter confirms that informed consent was recorded (the fact and the time only)."""
        self._expect("consent", "consent")
        at = now_text()
        self.state["consent_at"] = at
        self.state["done"]["consent"] = {"at": at}
        self.save()

    def task_of(self, step: Step) -> dict:
        return self.tasks[step.task]

    def begin_trial(self, step_id: str) -> Step:
        """Mark the trial as in progress (written before the arm moves: a crash from here on leaves it
        incomplete, never silently missing)."""
        step = self._expect(step_id, "trial")
        if self.state["consent_at"] is None:
            raise ConfigError(f"participant {self.code}", "consent has not been confirmed")
        self.state["in_progress"] = step.id
        self.state["in_progress_since"] = now_text()
        self.save()
        return step

    def end_trial(self, step_id: str, result: dict, drive_file: str | None) -> None:
        if self.state.get("in_progress") != step_id:
            raise ConfigError(f"participant {self.code}", f"trial {step_id!r} is not in progress")
        self.state["done"][step_id] = {"status": "complete", **result, "drive": drive_file, "at": now_text()}
        self.state["in_progress"] = None
        self.state.pop("in_progress_since", None)
        self.save()

    def abort_trial(self, why: str) -> str | None:
        """The trial in progress ends as incomplete (a page reload, a stop); returns its id."""
        step_id = self.state.get("in_progress")
        if step_id:
            self._mark_incomplete(step_id, why)
        return step_id

    def _mark_incomplete(self, step_id: str, why: str) -> None:
        self.state["done"][step_id] = {"status": "incomplete", "why": why, "at": now_text()}
        self.state["in_progress"] = None
        self.state.pop("in_progress_since", None)
        self.resumed_incomplete = step_id
        self.save()

    def answer_tlx(self, step_id: str, values: dict) -> float:
        """The six raw-TLX subscales 0-100 (DataError, one line, for a missing or out-of-range one)."""
        self._expect(step_id, "tlx")
        score = raw_tlx(values, f"participant {self.code} {step_id}")
        ratings = {s: float(values.get(s, values.get(f"tlx_{s}"))) for s in SUBSCALES}
        self.state["done"][step_id] = {"ratings": ratings, "raw_tlx": score, "at": now_text()}
        self.save()
        return score

    def answer_liking(self, step_id: str, rating, comment: str = "") -> None:
        self._expect(step_id, "liking")
        lo, hi = LIKING
        if isinstance(rating, bool) or not isinstance(rating, (int, float)) or rating != int(rating) or not lo <= rating <= hi:
            raise DataError(f"participant {self.code} {step_id}", f"liking {rating!r}; expected a whole number {lo}-{hi}")
        self.state["done"][step_id] = {"rating": int(rating), "comment": str(comment or "")[:COMMENT_MAX],
                                       "at": now_text()}  # fmt: skip
        self.save()

    def answer_ranking(self, order: list, comment: str = "") -> None:
        """The interfaces' letters, most preferred first: each letter of the participant's blocks once."""
        self._expect("ranking", "ranking")
        if sorted(map(str, order)) != sorted(self.letters):
            raise DataError(f"participant {self.code} ranking", f"{order!r}; expected each of "
                                                                f"{', '.join(sorted(self.letters))} once")  # fmt: skip
        self.state["done"]["ranking"] = {"order": [str(x) for x in order], "comment": str(comment or "")[:COMMENT_MAX],
                                         "at": now_text()}  # fmt: skip
        self.save()

    # ------------------------------------------------------------------------------------------ tables
    def responses(self) -> dict:
        done = self.state["done"]
        out = {"participant": self.code, "consent_at": self.state["consent_at"], "tlx": {}, "liking": {},
               "ranking": done.get("ranking")}  # fmt: skip
        for L in self.letters:
            if f"tlx-{L}" in done:
                out["tlx"][L] = done[f"tlx-{L}"]
            if f"liking-{L}" in done:
                out["liking"][L] = done[f"liking-{L}"]
        return out

    def trial_rows(self) -> list[dict]:
        """The long-format rows `coreach study analyze` reads: every ended trial (practice and incomplete ones
        flagged, which the analysis leaves out); the block's TLX, liking and final rank on its last complete
        measured trial (the block's rating, once)."""
        done = self.state["done"]
        rank = {L: i + 1 for i, L in enumerate(done["ranking"]["order"])} if "ranking" in done else {}
        rows, last = [], {}
        for step in self.steps:
            rec = done.get(step.id)
            if step.kind != "trial" or rec is None:
                continue
            row = {"participant": self.code, "condition": step.letter, "task": step.task, "trial": step.trial,
                   "practice": int(step.practice), "complete": int(rec["status"] == "complete")}  # fmt: skip
            if rec["status"] == "complete":
                row.update({k: rec.get(k) for k in TRIAL_COLUMNS if k in rec and k not in row})
                if not step.practice:
                    last[step.letter] = row
            rows.append(row)
        for L, row in last.items():
            tlx, liking = done.get(f"tlx-{L}"), done.get(f"liking-{L}")
            if tlx:
                row.update({f"tlx_{s}": v for s, v in tlx["ratings"].items()})
            if liking:
                row["liking"] = liking["rating"]
            if L in rank:
                row["preference"] = rank[L]
        return rows

    def trials_csv(self) -> str:
        buf = io.StringIO()
        writer = csv.DictWriter(buf, fieldnames=TRIAL_COLUMNS, extrasaction="ignore", lineterminator="\n")
        writer.writeheader()
        for row in self.trial_rows():
            writer.writerow({k: ("" if row.get(k) is None else row.get(k)) for k in TRIAL_COLUMNS})
        return buf.getvalue()


class SessionLock:
    """One running session per participant: a lock file holding the process id, taken with O_EXCL. A lock
    whose process is gone (a killed server) is taken over."""

    def __init__(self, folder: Path):
        self.path = private_folder(folder) / ".lock"

    def __enter__(self) -> SessionLock:
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
            except FileExistsError:
                try:
                    pid = int(self.path.read_text().strip() or "0")
                except (OSError, ValueError):
                    pid = 0
                if pid and process_running(pid):
                    raise ConfigError(str(self.path.parent), f"a session for this participant is already running "
                                                             f"(process {pid})") from None  # fmt: skip
                self.path.unlink(missing_ok=True)
                continue
            with os.fdopen(fd, "w") as fh:
                fh.write(str(os.getpid()))
            return self
        raise ConfigError(str(self.path.parent), "could not take the session lock")

    def __exit__(self, *exc) -> None:
        self.path.unlink(missing_ok=True)
