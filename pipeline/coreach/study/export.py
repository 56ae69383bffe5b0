"""`coreach study export`: a copy of a study version's data to share, without free text or timestamps.

What goes in: the plan (conditions, letters, pseudonymous codes, schedule), one trial table of every session,
the questionnaire answers as numbers (raw TLX subscales, liking, ranking), the analysis tables and, with
`drives`, the recorded drives. What stays out: comments (free text can name or describe a person), the times
of consent, of each step and of the plan (dates and times are identifiers in common de-identification
practice), and anything about the computer. The copy is written to a temporary folder and renamed into place.
"""

from __future__ import annotations

import json
import shutil
import uuid
from pathlib import Path

from coreach.errors import ConfigError
from coreach.study.files import private_folder, write_private
from coreach.study.plan import PLAN_FILE, SESSIONS, latest_folder, read_plan
from coreach.study.session import DRIVES, RESPONSES_FILE, TRIALS_FILE
from coreach.study.withdraw import EXPORTS

FREE_TEXT = ("comment",)
TIMES = ("at", "consent_at", "written_at", "created_at", "in_progress_since")


def _scrub(value):
    """Drop free-text and time fields at any depth."""
    if isinstance(value, dict):
        return {k: _scrub(v) for k, v in value.items() if k not in FREE_TEXT and k not in TIMES}
    if isinstance(value, list):
        return [_scrub(v) for v in value]
    return value


def export_study(root: Path, name: str, version: int | None = None, out: Path | None = None,
                 drives: bool = False) -> dict:  # fmt: skip
    folder = latest_folder(Path(root), name, version)
    document = read_plan(folder / PLAN_FILE)
    sessions = sorted(p for p in (folder / SESSIONS).glob("*") if (p / TRIALS_FILE).is_file())
    if not sessions:
        raise ConfigError(f"study {name} v{document['version']}", "no session has trials yet; nothing to export")
    target = Path(out) if out is not None else folder / EXPORTS / f"export-v{document['version']}"
    if target.exists():
        raise ConfigError(str(target), "exists; give another --out or remove it")
    private_folder(target.parent)
    tmp = target.parent / f".{target.name}.{uuid.uuid4().hex[:8]}.tmp"
    private_folder(tmp)
    try:
        plan = _scrub({k: v for k, v in document.items() if k != "cautions"})
        write_private(tmp / PLAN_FILE, json.dumps(plan, indent=2, ensure_ascii=False) + "\n")
        header, rows, answers, codes = None, [], [], []
        for s in sessions:
            lines = (s / TRIALS_FILE).read_text(encoding="utf-8").splitlines()
            header = header or lines[0]
            if lines[0] != header:
                raise ConfigError(str(s / TRIALS_FILE), f"columns differ from the other sessions' ({header})")
            rows += lines[1:]
            if (s / RESPONSES_FILE).is_file():
                answers.append(_scrub(json.loads((s / RESPONSES_FILE).read_text(encoding="utf-8"))))
            codes.append(s.name)
            if drives and (s / DRIVES).is_dir():
                for f in sorted((s / DRIVES).glob("*.parquet")):
                    private_folder(tmp / DRIVES / s.name)
                    shutil.copy2(f, tmp / DRIVES / s.name / f.name)
        write_private(tmp / TRIALS_FILE, "\n".join([header, *rows]) + "\n")
        write_private(tmp / RESPONSES_FILE, json.dumps(answers, indent=2) + "\n")
        write_private(tmp / "participants.txt", "\n".join(codes) + "\n")  # for withdraw: which exports hold whom
        analysis = folder / "analysis"
        for f in sorted(analysis.glob("*.csv")) if analysis.is_dir() else []:
            write_private(tmp / "analysis" / f.name, f.read_bytes())
        tmp.rename(target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return {"study": name, "version": document["version"], "folder": str(target), "participants": len(codes),
            "trial_rows": len(rows), "drives": drives}  # fmt: skip
