"""Pseudonymous participant codes (P01-7Q3K): an index and a random suffix, never a name."""

from __future__ import annotations

import re

import numpy as np

from coreach.errors import ConfigError

# Letters and digits that are hard to confuse when read aloud or written by hand (no 0/O, 1/I/L, U/V)
ALPHABET = "23456789ABCDEFGHJKMNPQRSTWXYZ"
SUFFIX_LENGTH = 4
CODE_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,31}$")  # a lab's own code: short, no spaces, safe as a folder


def generate_codes(count: int, rng: np.random.Generator) -> list[str]:
    """`count` codes P<index>-<suffix>; the index keeps them unique, the suffix keeps them unguessable from
    the index alone (so a code typed on a form is checked against the plan, not just counted)."""
    width = max(2, len(str(count)))
    out = []
    for k in range(count):
        suffix = "".join(ALPHABET[i] for i in rng.integers(0, len(ALPHABET), SUFFIX_LENGTH))
        out.append(f"P{k + 1:0{width}d}-{suffix}")
    return out


def check_codes(codes: list[str], count: int, where: str) -> list[str]:
    """The codes, after checking there is one per participant, each usable as a folder name, none twice."""
    if len(codes) != count:
        raise ConfigError(f"{where}.codes", f"{len(codes)} codes for {count} participants; expected one each")
    seen: set[str] = set()
    for code in codes:
        if not isinstance(code, str) or not CODE_PATTERN.match(code):
            raise ConfigError(f"{where}.codes", f"code {code!r}: expected letters, digits, '-' or '_' "
                                                "(at most 32), no spaces; a pseudonym, never a name")  # fmt: skip
        if code.upper() in seen:  # case-blind: P01 and p01 would share a folder on some file systems
            raise ConfigError(f"{where}.codes", f"participant code {code!r} appears twice; codes must be unique")
        seen.add(code.upper())
    return list(codes)
