"""The cautions, one copy: every help text, terminal summary, JSON output and bundle that leads toward a person."""

from __future__ import annotations

import textwrap

# Kept in the runtime, importing only the standard library, so the robot computer's
# `coreach-robot`, the bundle's model card and the workstation's commands all print the same words.
CAUTIONS = (
    "This is research software. It is not a medical device and has not been certified as one.",
    "Before any use with people: obtain an ethics review, fit a hardware emergency stop within reach of the "
    "user and the supervisor, and set speed and force limits per ISO 10218-1/-2 and ISO/TS 15066 "
    "(and ISO 13482 for personal-care robots).",
    "Follow your local regulations and the judgement of qualified professionals (clinicians, occupational "
    "therapists, safety engineers).",
    "The runtime safety filter (stick box and deadband, non-finite-value fault latch, input watchdog, joint "
    "speed and tool speed caps, joint position look-ahead, workspace box, separation from the scene's modelled "
    "bodies) is always on and cannot be switched off; it reduces risk but does not replace the measures above.",
    "The scene's bodies, the person among them, are models: nothing in coreach senses a person. Keep-out and "
    "reduced-speed zones protect only as far as the modelled (or tracked) positions are right.",
)

# Where a person's own input is recorded (test drives, imported recordings): research with people.
RECORDING_CAUTION = (
    "Recording a person's drives is research with people: record only under an approved ethics review, with "
    "each participant's informed consent given beforehand (they may stop at any time and have their "
    "recordings deleted), and keep the files as that review and your local data-protection rules require."
)


# Where a study with people is planned or analysed (coreach study): the study is the lab's, under its review.
STUDY_CAUTION = (
    "A user study is research with people: it needs an approved ethics review and each participant's informed "
    "consent before the first session. coreach supports that process (schedules, pseudonymous codes, "
    "statistics) and does not replace it; follow your local regulations and the judgement of qualified "
    "professionals on who may take part, how sessions are supervised and how data are kept."
)


def cautions(recording: bool = False, study: bool = False) -> list[str]:
    """The cautions as a list (the `cautions` field of a command's JSON); `recording` adds the consent line,
    `study` the line on ethics approval and consent for a user study."""
    return [*CAUTIONS, *([RECORDING_CAUTION] if recording else []), *([STUDY_CAUTION] if study else [])]


def caution_lines(recording: bool = False, width: int | None = None, study: bool = False) -> list[str]:
    """A "Cautions" heading and one bullet per caution, wrapped to `width` columns when given (help texts)."""
    out = ["Cautions"]
    for text in cautions(recording, study):
        if width is None:
            out.append(f"  - {text}")
        else:
            out += textwrap.wrap(text, width, initial_indent="  - ", subsequent_indent="    ",
                                 break_on_hyphens=False)
    return out


def caution_text(recording: bool = False, width: int = 100, study: bool = False) -> str:
    """The cautions as the closing block of a `--help` text."""
    return "\n".join(caution_lines(recording, width, study))
