"""A study's conditions: which interface each is, checked before anything is planned."""

from __future__ import annotations

import re
from pathlib import Path

from coreach.errors import ConfigError

BASELINES = ("direct", "blend")  # the interface plugins a participant can drive without a bundle
KINDS = ("bundle", *BASELINES)
# NAME@ALIAS and NAME/VERSION as the registry names a released version (coreach replay, test-drive)
_REGISTRY_REF = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*(@[A-Za-z0-9][A-Za-z0-9._-]*|/[0-9]+)$")


def check_conditions(conditions: list[dict], where: str, base: Path | None = None) -> list[dict]:
    """Each condition as {kind, ref, name, ref_checked}; ConfigError naming the first bad one.

    A bundle folder must exist now (a plan naming a missing folder would fail at the first session).
    A registry reference is checked for its form only: the plan is made offline, and which version an
    alias points to may change before the sessions; the session code resolves it then.
    """
    if not conditions:
        raise ConfigError(f"{where}.conditions", "no conditions; expected at least two interfaces to compare")
    out, names = [], set()
    for i, c in enumerate(conditions):
        at = f"{where}.conditions.{i}"
        kind, ref = c.get("kind"), c.get("ref")
        if kind not in KINDS:
            raise ConfigError(f"{at}.kind", f"unknown condition kind {kind!r}; expected one of {', '.join(KINDS)}")
        checked = "baseline"
        if kind == "bundle":
            if not ref:
                raise ConfigError(f"{at}.ref", "a bundle condition needs ref: a bundle folder, NAME@ALIAS or "
                                               "NAME/VERSION")  # fmt: skip
            folder = Path(ref).expanduser()
            if not folder.is_absolute() and base is not None:
                folder = base / folder
            if folder.is_dir():
                checked = "folder exists"
            elif _REGISTRY_REF.match(ref) and not ref.startswith((".", "/", "~")):
                checked = "registry reference, form only"
            else:
                raise ConfigError(f"{at}.ref", f"bundle folder {ref} does not exist (and it is not a NAME@ALIAS "
                                               "or NAME/VERSION reference)")  # fmt: skip
        elif ref:
            raise ConfigError(f"{at}.ref", f"a {kind} condition is a baseline and takes no ref; got {ref!r}")
        name = c.get("name") or (ref if kind == "bundle" else kind)
        if name in names:
            raise ConfigError(f"{at}.name", f"condition name {name!r} appears twice; give each condition its own name")
        names.add(name)
        out.append({"kind": kind, "ref": ref, "name": name, "ref_checked": checked})
    if len(out) < 2:
        raise ConfigError(f"{where}.conditions", "one condition; a within-subject comparison needs at least two")
    return out
