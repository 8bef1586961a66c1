"""The words for review states, one source of truth for the GUI, the packet and the command line.

A check's state is computed each time from the analysis and the records (never stored); a
stage's sign-off state is computed from its sign-offs and its current fingerprint.
"""

from __future__ import annotations

from enum import StrEnum
from typing import Final

__all__ = [
    "ANSWER_WORDS",
    "CHECK_STATE_MEANINGS",
    "PASSING_STATES",
    "SIGNOFF_STATE_MEANINGS",
    "VERDICT_WORDS",
    "WHERE_WORDS",
    "CheckState",
    "SignoffState",
]


class CheckState(StrEnum):
    """State of one check. The value is the word shown to users."""

    MET = "met"
    NOT_MET = "not met"
    NO_VALUE = "no value"
    WAIVED = "waived"
    OPEN = "open"
    NOT_APPLICABLE = "n/a"


CHECK_STATE_MEANINGS: Final[dict[CheckState, str]] = {
    CheckState.MET: "the value lies within the limits, or the manual check was answered yes",
    CheckState.NOT_MET: "the value lies outside the limits, or the manual check was answered no",
    CheckState.NO_VALUE: "the metric could not be computed; the reason is shown beside it",
    CheckState.WAIVED: "a reviewer waived the check with a recorded justification",
    CheckState.OPEN: "a manual check that nobody has answered yet",
    CheckState.NOT_APPLICABLE: "a manual check answered as not applicable to this design",
}

# States that let a checklist pass: everything else (not met, no value, open) holds it back.
PASSING_STATES: Final = frozenset({CheckState.MET, CheckState.WAIVED, CheckState.NOT_APPLICABLE})

# Recorded answers of manual checks, and how they read.
ANSWER_WORDS: Final[dict[str, str]] = {
    "yes": "answered yes",
    "no": "answered no",
    "n/a": "not applicable",
}


class SignoffState(StrEnum):
    """A stage's sign-off state. The value is the word shown to users."""

    APPROVED = "approved"
    CHANGES = "changes needed"
    STALE = "stale"
    NONE = "not signed"


SIGNOFF_STATE_MEANINGS: Final[dict[SignoffState, str]] = {
    SignoffState.APPROVED: "a reviewer approved the stage as it is now",
    SignoffState.CHANGES: "a reviewer asked for changes to the stage as it is now",
    SignoffState.STALE: "every sign-off was given to an earlier version of the stage; sign again",
    SignoffState.NONE: "nobody has signed this stage",
}

VERDICT_WORDS: Final[dict[str, str]] = {
    "approve": "approved",
    "changes": "changes needed",
}

# Where a numeric check takes its metric.
WHERE_WORDS: Final[dict[str, str]] = {
    "isolated": "isolated",
    "in_chain": "in chain",
    "chain": "whole chain",
}
