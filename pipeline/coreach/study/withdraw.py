"""`coreach study withdraw`: delete one participant's data everywhere in the study folder, then rebuild.

A participant may withdraw at any time (the consent form says so). Their session folders (recordings,
responses, state, trial table) are removed from every version of the study, any export holding them is
removed, and every analysis is rebuilt from the participants who remain. The code is recorded as withdrawn
(the code and the time only) so that it is never used again for a new session.

Killed at any point, running the command again finishes the job: the withdrawal is recorded first, folders
are moved out of `sessions/` by one rename each before they are deleted, and the analyses are rebuilt last.
"""

from __future__ import annotations

import json
import shutil
import uuid
from pathlib import Path

from coreach.errors import ConfigError
from coreach.study.analyze import run_analysis
from coreach.study.files import private_folder, write_private
from coreach.study.plan import PLAN_FILE, SESSIONS, read_plan, versions
from coreach.study.session import SessionLock, now_text

WITHDRAWN = "withdrawn.json"
TRASH = ".withdrawn-trash"  # beside sessions/, never read by the analysis
EXPORTS = "exports"


def withdrawn_codes(folder: Path) -> dict[str, str]:
    path = folder / WITHDRAWN
    if not path.is_file():
        return {}
    try:
        return dict(json.loads(path.read_text(encoding="utf-8"))["codes"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ConfigError(str(path), f"not a readable withdrawal record ({type(exc).__name__}: {exc})") from None


def _holds(export: Path, code: str) -> bool:
    """Whether an export folder (or a half-written one) may hold the participant: when in doubt, yes."""
    listing = export / "participants.txt"
    if not listing.is_file():
        return True
    return code in listing.read_text(encoding="utf-8").split()


def withdraw(root: Path, name: str, code: str, warn=print) -> dict:
    """Withdraw `code` from every version of study `name`; returns what was removed and rebuilt."""
    study = Path(root) / name
    found = versions(study)
    if not found:
        raise ConfigError(f"study {name}", f"no plan under {study}; nothing to withdraw from")
    folders = [study / f"v{v}" for v in found]
    planned = [f for f in folders if any(p["code"] == code for p in read_plan(f / PLAN_FILE)["plan"]["participants"])]
    if not planned:
        raise ConfigError(f"participant {code!r}", f"not a code of any version of study {name}")
    removed, rebuilt = [], []
    for folder in planned:
        session = folder / SESSIONS / code
        if session.is_dir():
            with SessionLock(session):  # refuses while a server runs this participant's session
                pass
        codes = withdrawn_codes(folder)
        if code not in codes:
            codes[code] = now_text()
            write_private(folder / WITHDRAWN, json.dumps({"codes": codes}, indent=2) + "\n")
        if session.is_dir():
            trash = private_folder(folder / TRASH) / f"{code}-{uuid.uuid4().hex[:8]}"
            session.rename(trash)  # one step: the analysis no longer sees the participant
            removed.append(str(session))
        for export in sorted((folder / EXPORTS).glob("*")) if (folder / EXPORTS).is_dir() else []:
            if _holds(export, code):
                shutil.rmtree(export)
                removed.append(str(export))
        if (folder / TRASH).is_dir():
            shutil.rmtree(folder / TRASH)
        analysis = folder / "analysis"
        if analysis.is_dir():
            left = sorted((folder / SESSIONS).glob("*/trials.csv"))
            if left:
                run_analysis(Path(root), name, version=int(folder.name[1:]), trials=left, warn=warn)
                rebuilt.append(str(analysis))
            else:
                shutil.rmtree(analysis)
                removed.append(str(analysis))
    return {"study": name, "participant": code, "versions": [f.name for f in planned], "removed": removed,
            "rebuilt": rebuilt}  # fmt: skip
