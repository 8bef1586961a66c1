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
    "FIELD_WORDS",
    "FOUR_EYES_WORD",
    "PASSING_STATES",
    "OLDER_VERDICTS",
    "REPLACED_WORD",
    "SIGNOFF_STATE_MEANINGS",
    "VERDICTS",
    "VERDICT_WORDS",
    "WHERE_WORDS",
    "CheckState",
    "SignoffState",
    "current_verdict",
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

    ACCEPTED = "accepted"
    REWORK = "returned for rework"
    OUT_OF_DATE = "out of date"
    UNRECORDED = "unrecorded"
    NONE = "not signed"


SIGNOFF_STATE_MEANINGS: Final[dict[SignoffState, str]] = {
    SignoffState.ACCEPTED: "a reviewer accepted the stage as it is now",
    SignoffState.REWORK: "a reviewer returned the stage as it is now for rework",
    SignoffState.OUT_OF_DATE: "every sign-off was given to an earlier design of the stage; sign again",
    SignoffState.UNRECORDED: ("a sign-off on this stage has no audit event that holds it: it was written or "
                              "edited outside the program and counts as no verdict; sign again"),
    SignoffState.NONE: "nobody has signed this stage",
}

# The verdicts a reviewer gives, as stored in the file, and the words shown for them.
VERDICTS: Final = ("accept", "rework")
VERDICT_WORDS: Final[dict[str, str]] = {
    "accept": str(SignoffState.ACCEPTED),
    "rework": str(SignoffState.REWORK),
}

# Verdicts written by earlier releases: files holding them still load, read as the new ones.
# Audit events recorded with them are never rewritten (their hashes cover the old words);
# a sign-off is matched to its event through this table.
OLDER_VERDICTS: Final[dict[str, str]] = {
    "approve": "accept",
    "changes": "rework",
}

# A sign-off followed by a later one of the same reviewer on the same stage: it stays in the
# record and no longer counts towards the stage's state.
REPLACED_WORD: Final = "replaced"

# An acceptance by the person who last changed the stage, where the project's four-eyes rule
# (settings.four_eyes) forbids it: it does not count.
FOUR_EYES_WORD: Final = "accepted by its own author"


def current_verdict(word: str) -> str:
    """The stored verdict ``word`` in today's words (an older word is translated; others kept)."""
    return OLDER_VERDICTS.get(word, word)


# Where a numeric check takes its metric.
WHERE_WORDS: Final[dict[str, str]] = {
    "isolated": "isolated",
    "in_chain": "in chain",
    "from_input": "from the chain input",
    "chain": "whole chain",
}


# Op-amp model fields and project settings as a reader names them, for notes, reasons and the
# audit trail's change lines (the file keys stay in the file and in its error messages, which
# need the JSON path).
FIELD_WORDS: Final[dict[str, str]] = {
    "description": "description",
    "a0_db": "open-loop gain",
    "gbw_hz": "gain-bandwidth product",
    "p2_hz": "second pole",
    "rout_ohm": "output resistance",
    "rin_ohm": "differential input resistance",
    "cin_diff_f": "differential input capacitance",
    "cin_cm_f": "common-mode input capacitance",
    "en_v_rthz": "input voltage noise density",
    "en_corner_hz": "voltage noise 1/f corner",
    "in_a_rthz": "input current noise density",
    "in_corner_hz": "current noise 1/f corner",
    "swing_v": "output swing",
    "slew_v_per_s": "slew rate",
    "input_type": "input stage type",
    "vos_v": "input offset voltage",
    "vos_drift_v_per_c": "input offset voltage drift",
    "ib_a": "input bias current",
    "ios_a": "input offset current",
    "cmrr_db": "common-mode rejection ratio",
    "psrr_db": "power-supply rejection ratio",
    "supply_variation_v": "supply variation",
    "temp_range_c": "operating temperature range",
}


# The Monte Carlo spread in the program: stopped by the user, or still to come after an edit.
SPREAD_CANCELLED: Final = "not computed: cancelled by the user (the next edit runs it again)"
SPREAD_FOLLOWS: Final = "computed with the Monte Carlo spread, which follows in the background"
