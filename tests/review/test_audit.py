"""The hash-chained audit trail: the hash rule, and which tampering is detected and which is not."""

from __future__ import annotations

import copy
import dataclasses
import hashlib

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from review_helpers import base_project

from stagewise.model.project import AuditEvent, Project
from stagewise.review.audit import GENESIS_PREV, append_event, event_hash, verify_trail


def _trail(count: int = 5) -> Project:
    project = base_project()
    for index in range(count):
        append_event(project, f"reviewer {index % 2}", "comment", {"stage": "rc", "index": index, "text": f"note {index}"},
                     time=f"2026-11-0{index + 1}T09:30:00Z")
    return project


def test_first_event_hash_follows_the_published_rule() -> None:
    project = base_project()
    event = append_event(project, "Ana Ruiz", "signoff", {"stage": "rc", "ü": 1.5}, time="2026-11-02T08:00:00Z")
    # The canonical text written out by hand from the rule in DEVELOPERS.md: keys sorted, no
    # spaces, non-ASCII kept, UTF-8; the event without "hash" but with "prev".
    text = ('{"detail":{"stage":"rc","ü":1.5},"prev":"' + "0" * 64 + '","seq":1,'
            '"time":"2026-11-02T08:00:00Z","what":"signoff","who":"Ana Ruiz"}')
    # Reference library: Python hashlib, sha256 (FIPS 180-4 SHA-256).
    assert event.hash == hashlib.sha256(text.encode("utf-8")).hexdigest()
    assert event.prev == GENESIS_PREV == "0" * 64
    assert event.seq == 1


def test_events_link_to_the_hash_before_them() -> None:
    project = _trail(3)
    # Common practice, no source: a hash chain links each record to the digest of the one before.
    assert [event.seq for event in project.audit] == [1, 2, 3]
    assert project.audit[1].prev == project.audit[0].hash
    assert project.audit[2].prev == project.audit[1].hash
    assert verify_trail(project.audit).intact
    assert verify_trail([]).intact


def test_detail_is_copied_so_later_edits_do_not_reach_the_event() -> None:
    project = base_project()
    detail = {"stage": "rc", "values": [1, 2]}
    event = append_event(project, "Ana Ruiz", "comment", detail, time="2026-11-02T08:00:00Z")
    detail["values"].append(3)
    assert event.detail == {"stage": "rc", "values": [1, 2]}
    assert verify_trail(project.audit).intact


@pytest.mark.parametrize(("who", "what", "time"), [
    ("", "comment", None), ("  ", "comment", None), ("Ana", "", None),
    ("Ana", "comment", "yesterday"), ("Ana", "comment", "2026-11-02T08:00:00+02:00"),
])
def test_bad_event_input_is_refused_and_nothing_is_appended(who: str, what: str, time: str | None) -> None:
    project = base_project()
    with pytest.raises(ValueError):
        append_event(project, who, what, {}, time=time)
    assert project.audit == []


def test_detail_that_is_not_json_is_refused() -> None:
    project = base_project()
    with pytest.raises(ValueError, match="JSON"):
        append_event(project, "Ana", "comment", {"x": object()})
    with pytest.raises(ValueError):
        append_event(project, "Ana", "comment", {"x": float("nan")})
    assert project.audit == []


def _rehash(event: AuditEvent) -> None:
    event.hash = event_hash(event)


def test_an_edited_event_is_named() -> None:
    events = copy.deepcopy(_trail().audit)
    events[2].detail["text"] = "something else"
    result = verify_trail(events)
    assert not result.intact
    assert (result.broken_index, result.broken_seq) == (2, 3)
    assert "does not match its hash" in (result.why or "")
    assert "seq 3" in result.sentence()


def test_an_edited_who_or_time_is_named() -> None:
    for field, value in (("who", "someone else"), ("time", "2026-12-30T00:00:00Z"), ("what", "signoff")):
        events = copy.deepcopy(_trail().audit)
        setattr(events[1], field, value)
        result = verify_trail(events)
        assert (result.intact, result.broken_index) == (False, 1), field


def test_a_deleted_event_is_named_at_the_event_after_it() -> None:
    events = copy.deepcopy(_trail().audit)
    del events[2]
    result = verify_trail(events)
    assert not result.intact
    assert (result.broken_index, result.broken_seq) == (2, 4)
    assert "3 was expected" in (result.why or "")


def test_a_deleted_first_event_is_named() -> None:
    events = copy.deepcopy(_trail().audit)
    del events[0]
    result = verify_trail(events)
    assert (result.intact, result.broken_index, result.broken_seq) == (False, 0, 2)


def test_two_swapped_events_are_named_at_the_first_of_them() -> None:
    events = copy.deepcopy(_trail().audit)
    events[1], events[3] = events[3], events[1]
    result = verify_trail(events)
    assert (result.intact, result.broken_index, result.broken_seq) == (False, 1, 4)


def test_swapped_events_with_their_seqs_exchanged_are_still_named() -> None:
    # A forger who also swaps the seq numbers breaks the hashes (seq is hashed).
    events = copy.deepcopy(_trail().audit)
    events[1], events[2] = events[2], events[1]
    events[1].seq, events[2].seq = 2, 3
    result = verify_trail(events)
    assert (result.intact, result.broken_index) == (False, 1)


def test_an_edited_prev_is_named() -> None:
    events = copy.deepcopy(_trail().audit)
    events[3].prev = "f" * 64
    result = verify_trail(events)
    assert (result.intact, result.broken_index) == (False, 3)
    # The same edit with the event re-hashed breaks the link instead.
    _rehash(events[3])
    result = verify_trail(events)
    assert (result.intact, result.broken_index) == (False, 3)
    assert "prev" in (result.why or "")


def test_an_appended_event_with_a_forged_hash_is_named() -> None:
    events = copy.deepcopy(_trail().audit)
    last = events[-1]
    events.append(AuditEvent(seq=last.seq + 1, time="2026-11-09T10:00:00Z", who="intruder", what="signoff",
                             detail={"stage": "rc", "verdict": "approve"}, prev=last.hash, hash="ab" * 32))
    result = verify_trail(events)
    assert (result.intact, result.broken_index, result.broken_seq) == (False, 5, 6)
    events[-1] = dataclasses.replace(events[-1], hash="not a hash")
    result = verify_trail(events)
    assert (result.intact, result.broken_index) == (False, 5)
    assert "hexadecimal" in (result.why or "")


def test_an_edited_middle_event_rehashed_alone_breaks_the_next_link() -> None:
    events = copy.deepcopy(_trail().audit)
    events[1].detail["text"] = "rewritten"
    _rehash(events[1])
    result = verify_trail(events)
    assert (result.intact, result.broken_index, result.broken_seq) == (False, 2, 3)
    assert "prev" in (result.why or "")


def test_what_the_chain_cannot_detect() -> None:
    """The honest limits: the rule has no secret, so a forger who re-hashes is not caught."""
    original = _trail().audit
    # 1. An event appended with a correctly computed hash and prev verifies: anyone can do it.
    forged = copy.deepcopy(original)
    forged.append(AuditEvent(seq=6, time="2026-11-09T10:00:00Z", who="intruder", what="signoff",
                             detail={"stage": "rc", "verdict": "approve"}, prev=forged[-1].hash, hash=""))
    _rehash(forged[-1])
    assert verify_trail(forged).intact
    # 2. An edit followed by re-hashing every event after it verifies too.
    rebuilt = copy.deepcopy(original)
    rebuilt[1].detail["text"] = "rewritten"
    for index in range(1, len(rebuilt)):
        rebuilt[index].prev = rebuilt[index - 1].hash
        _rehash(rebuilt[index])
    assert verify_trail(rebuilt).intact
    # 3. Events cut from the end leave a shorter chain that verifies.
    assert verify_trail(copy.deepcopy(original)[:3]).intact


# Property tests: for any trail and any single tampering, verify names the tampered position.

_details = st.dictionaries(st.text(max_size=8), st.one_of(st.integers(), st.text(max_size=12), st.booleans(),
                                                           st.floats(allow_nan=False, allow_infinity=False)),
                           max_size=4)


@st.composite
def _trails(draw: st.DrawFn) -> list[AuditEvent]:
    project = base_project()
    for _ in range(draw(st.integers(min_value=2, max_value=8))):
        append_event(project, draw(st.sampled_from(["Ana", "Ben", "Émile"])),
                     draw(st.sampled_from(["signoff", "waiver", "comment"])), draw(_details),
                     time="2026-11-05T12:00:00Z")
    return project.audit


@settings(max_examples=60, deadline=None)
@given(_trails(), st.data())
def test_any_single_field_edit_is_named_at_its_event(events: list[AuditEvent], data: st.DataObject) -> None:
    index = data.draw(st.integers(min_value=0, max_value=len(events) - 1))
    field = data.draw(st.sampled_from(["seq", "time", "who", "what", "detail", "prev"]))
    event = events[index]
    replacement: object = {
        "seq": event.seq + 7, "time": "2027-01-01T00:00:00Z", "who": event.who + "x", "what": event.what + "x",
        "detail": {**event.detail, "tampered": True}, "prev": "e" * 64,
    }[field]
    setattr(event, field, replacement)
    result = verify_trail(events)
    assert (result.intact, result.broken_index) == (False, index)


@settings(max_examples=60, deadline=None)
@given(_trails(), st.data())
def test_any_deletion_before_the_end_or_any_swap_is_named(events: list[AuditEvent], data: st.DataObject) -> None:
    first = data.draw(st.integers(min_value=0, max_value=len(events) - 2))
    second = data.draw(st.integers(min_value=first + 1, max_value=len(events) - 1))
    swapped = list(events)
    swapped[first], swapped[second] = swapped[second], swapped[first]
    assert (verify_trail(swapped).intact, verify_trail(swapped).broken_index) == (False, first)
    shortened = events[:first] + events[first + 1:]
    assert (verify_trail(shortened).intact, verify_trail(shortened).broken_index) == (False, first)
