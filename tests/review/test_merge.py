"""Three-way merge of two edited copies of a project (review/merge.py) and merged audit trails."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import pytest
from hypothesis import HealthCheck, event, given, settings
from hypothesis import strategies as st

from stagewise.files.codec import dumps
from stagewise.files.project_file import load_project, loads_project
from stagewise.model.project import Part, Project
from stagewise.model.values import Quantity
from stagewise.review import actions
from stagewise.review.audit import MERGE_EVENT, append_event, check_records, event_hash, verify_trail
from stagewise.review.merge import merge_projects

DEMO = Path(__file__).resolve().parents[2] / "projects" / "hydrophone.stagewise.json"
_DEMO_PROJECT = load_project(DEMO)


def demo() -> Project:
    return copy.deepcopy(_DEMO_PROJECT)


def _part(project: Project, stage_id: str, ref: str) -> Any:
    stage = project.stage(stage_id)
    assert stage is not None
    part = stage.part(ref)
    assert part is not None
    return part


def _verified(project: Project) -> None:
    again = loads_project(dumps(project))  # what is written loads again
    assert verify_trail(again.audit).intact, verify_trail(again.audit).sentence()
    assert check_records(again).problems == ()


def test_edits_of_different_parts_and_signoffs_of_different_stages_merge() -> None:
    # Common practice, no source: a three-way merge takes each side's change where only it changed.
    base = demo()
    ours, theirs = demo(), demo()
    _part(ours, "buffer", "R1").value = Quantity.of("3M3")
    actions.record_part_changes(base, ours, "Ana", time="2026-12-01T09:00:00Z")
    actions.sign(ours, "aaf2", "Ana", "reviewer", "accept", time="2026-12-01T10:00:00Z")
    actions.sign(theirs, "adc", "Bo", "reviewer", "accept", time="2026-12-01T11:00:00Z")
    result = merge_projects(base, ours, theirs, who="Cy", time="2026-12-02T08:00:00Z")
    assert result.conflicts == ()
    merged = result.project
    assert merged is not None
    assert _part(merged, "buffer", "R1").value.raw == "3M3"
    assert [s.name for s in merged.stage("aaf2").signoffs] == ["Ana"]  # type: ignore[union-attr]
    assert [s.name for s in merged.stage("adc").signoffs] == ["Bo"]  # type: ignore[union-attr]
    head = merged.audit[-1]
    assert head.what == MERGE_EVENT
    assert head.detail["heads"] == [ours.audit[-1].hash, theirs.audit[-1].hash]
    assert head.detail["base"] == base.audit[-1].hash
    _verified(merged)


def test_the_same_value_changed_differently_is_a_conflict_with_its_json_path() -> None:
    # Common practice, no source: a merge never picks between two edits of one value.
    base = demo()
    ours, theirs = demo(), demo()
    _part(ours, "buffer", "R1").value = Quantity.of("3M3")
    _part(theirs, "buffer", "R1").value = Quantity.of("4M7")
    result = merge_projects(base, ours, theirs, who="Cy")
    assert result.project is None
    index = [stage.id for stage in base.stages].index("buffer")
    ref_index = [part.ref for part in base.stage("buffer").parts].index("R1")  # type: ignore[union-attr]
    paths = {conflict.path: conflict for conflict in result.conflicts}
    path = f"stages[{index}].parts[{ref_index}].value"
    assert path in paths
    assert paths[path].ours == '"3M3"' and paths[path].theirs == '"4M7"'


def test_one_side_only_grows_the_trail_then_no_merge_event() -> None:
    base = demo()
    ours, theirs = demo(), demo()
    actions.sign(theirs, "adc", "Bo", "reviewer", "accept", time="2026-12-01T11:00:00Z")
    result = merge_projects(base, ours, theirs, who="Cy")
    assert result.project is not None
    assert [e.hash for e in result.project.audit] == [e.hash for e in theirs.audit]


def test_rebase_mode_keeps_theirs_and_rechains_ours() -> None:
    base = demo()
    ours, theirs = demo(), demo()
    actions.record_packet(theirs, "a" * 64, "Bo", time="2026-12-01T11:00:00Z")
    actions.comment(ours, "adc", "Ana", "Check the reference.", time="2026-12-01T12:00:00Z")
    result = merge_projects(base, ours, theirs, who="Ana", mode="rebase")
    assert result.project is not None
    trail = result.project.audit
    assert [e.hash for e in trail[:len(theirs.audit)]] == [e.hash for e in theirs.audit]
    assert trail[-1].what == "comment" and trail[-1].prev == theirs.audit[-1].hash
    assert all(e.what != MERGE_EVENT for e in trail)
    _verified(result.project)


def test_both_answering_one_manual_check_differently_is_a_conflict() -> None:
    base = demo()
    ours, theirs = demo(), demo()
    actions.answer(ours, "sensor", "c-measured", "yes", "Ana", time="2026-12-01T10:00:00Z")
    actions.answer(theirs, "sensor", "c-measured", "no", "Bo", time="2026-12-01T11:00:00Z")
    result = merge_projects(base, ours, theirs, who="Cy")
    assert result.project is None
    assert any(".answer" in conflict.path for conflict in result.conflicts)


# ---------------------------------------------------------------- branches in verify_trail

def _forked() -> Project:
    base = demo()
    ours, theirs = demo(), demo()
    actions.sign(ours, "aaf2", "Ana", "reviewer", "accept", time="2026-12-01T10:00:00Z")
    actions.sign(theirs, "adc", "Bo", "reviewer", "accept", time="2026-12-01T11:00:00Z")
    result = merge_projects(base, ours, theirs, who="Cy", time="2026-12-02T08:00:00Z")
    assert result.project is not None
    return result.project


def test_a_fork_without_its_merge_event_is_a_cut_chain() -> None:
    # Common practice, no source: a hash chain may branch only where a later node joins the branches.
    project = _forked()
    assert verify_trail(project.audit).intact
    cut = project.audit[:-1]
    result = verify_trail(cut)
    assert not result.intact and "second branch" in (result.why or "")
    assert result.broken_index == len(cut) - 1


def test_a_merge_event_naming_a_head_that_is_not_there_is_named() -> None:
    project = _forked()
    merge = project.audit[-1]
    merge.detail["heads"] = [merge.detail["heads"][0], "f" * 64]
    merge.hash = event_hash(merge)
    result = verify_trail(project.audit)
    assert not result.intact and result.broken_index == len(project.audit) - 1


def test_an_event_removed_from_one_branch_is_named() -> None:
    project = _forked()
    del project.audit[-3]  # ours' sign-off, in the first branch
    assert not verify_trail(project.audit).intact


def test_events_after_a_merge_continue_the_chain() -> None:
    project = _forked()
    append_event(project, "Cy", "comment", {"stage": "adc", "text": "after"}, time="2026-12-03T08:00:00Z")
    assert verify_trail(project.audit).intact


# ---------------------------------------------------------------- random edit sequences

VALUES = ["1k", "2k2", "4k7", "10k", "22k"]
EDITABLE = [("sensor", None), ("buffer", "R1"), ("gain", None), ("aaf1", None), ("driver", None)]
REVIEWERS = ["Ana", "Bo", "Cy"]


def _parts(project: Project) -> list[tuple[str, str]]:
    return [(stage.id, part.ref) for stage in project.stages for part in stage.parts
            if part.type == "R"]


_RESISTORS = _parts(_DEMO_PROJECT)
_MANUAL = [(stage.id, check.id) for stage in _DEMO_PROJECT.stages for check in stage.checks if check.is_manual]
_NUMERIC = [(stage.id, check.id) for stage in _DEMO_PROJECT.stages for check in stage.checks
            if not check.is_manual and check.waiver is None]
_CIRCUITS = [stage.id for stage in _DEMO_PROJECT.stages if not stage.is_block]

edit = st.one_of(
    st.tuples(st.just("value"), st.sampled_from(_RESISTORS), st.sampled_from(VALUES)),
    st.tuples(st.just("sign"), st.sampled_from([s.id for s in _DEMO_PROJECT.stages]), st.sampled_from(REVIEWERS)),
    st.tuples(st.just("comment"), st.sampled_from([s.id for s in _DEMO_PROJECT.stages]), st.sampled_from(REVIEWERS)),
    st.tuples(st.just("answer"), st.sampled_from(_MANUAL), st.sampled_from(["yes", "no", "n/a"])),
    st.tuples(st.just("waive"), st.sampled_from(_NUMERIC), st.sampled_from(REVIEWERS)),
    st.tuples(st.just("add part"), st.sampled_from(_CIRCUITS), st.sampled_from(VALUES)),
)


def _apply(project: Project, edits: list[Any], side: str) -> None:
    saved = copy.deepcopy(project)
    for number, (kind, target, choice) in enumerate(edits):
        time = f"2026-12-0{1 if side == 'ours' else 2}T{number // 60:02d}:{number % 60:02d}:00Z"
        if kind == "value":
            _part(project, target[0], target[1]).value = Quantity.of(choice)
            actions.record_part_changes(saved, project, side, time=time)
            saved = copy.deepcopy(project)
        elif kind == "sign":
            actions.sign(project, target, choice, "reviewer", "accept", time=time)
        elif kind == "comment":
            actions.comment(project, target, choice, f"{side} note {number}", time=time)
        elif kind == "answer":
            actions.answer(project, target[0], target[1], choice, side, time=time)
        elif kind == "waive":
            actions.waive(project, target[0], target[1], choice, "reviewer", f"{side} accepts it", time=time)
        else:  # a load resistor from the output to node 0, a new ref on each side
            stage = project.stage(target)
            assert stage is not None
            stage.parts.append(Part(ref=f"R{side}{number}", type="R", nodes=[stage.ports["out"], "0"],
                                    value=Quantity.of(choice)))
            actions.record_part_changes(saved, project, side, time=time)
            saved = copy.deepcopy(project)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(edit, max_size=6), st.lists(edit, max_size=6))
def test_random_edit_sequences_merge_or_report_every_collision(ours_edits: list[Any], theirs_edits: list[Any]) -> None:
    # Common practice, no source: a three-way merge keeps every change of each side and reports
    # every value both sides changed differently.
    base = demo()
    ours, theirs = demo(), demo()
    _apply(ours, ours_edits, "ours")
    _apply(theirs, theirs_edits, "theirs")
    result = merge_projects(base, ours, theirs, who="merger", time="2026-12-05T00:00:00Z")
    collisions = set()
    for stage_id, ref in _RESISTORS:
        old, mine, other = (_part(p, stage_id, ref).value.raw for p in (base, ours, theirs))
        if mine != old and other != old and mine != other:
            collisions.add((stage_id, ref))
    answered = {(kind, target) for kind, target, _ in ours_edits if kind in ("answer", "waive")} & \
               {(kind, target) for kind, target, _ in theirs_edits if kind in ("answer", "waive")}
    event("collision" if collisions or answered else "merged" if ours.audit != theirs.audit else "trivial")
    if collisions or answered:
        assert result.project is None
        stage_index = {stage.id: index for index, stage in enumerate(base.stages)}
        for stage_id, ref in collisions:
            ref_index = [p.ref for p in base.stage(stage_id).parts].index(ref)  # type: ignore[union-attr]
            assert f"stages[{stage_index[stage_id]}].parts[{ref_index}].value" in {c.path for c in result.conflicts}
        return
    assert result.conflicts == (), [c.sentence() for c in result.conflicts]
    merged = result.project
    assert merged is not None
    _verified(merged)
    for side in (ours, theirs):
        for stage in side.stages:
            held = merged.stage(stage.id)
            assert held is not None
            for signoff in stage.signoffs:
                assert signoff in held.signoffs
            for comment in stage.comments:
                assert comment in held.comments
        merged_hashes = {event.hash for event in merged.audit}
        assert {event.hash for event in side.audit} <= merged_hashes
        for stage in side.stages:
            held = merged.stage(stage.id)
            assert held is not None
            assert {part.ref for part in stage.parts} <= {part.ref for part in held.parts}
    for stage_id, ref in _RESISTORS:
        old, mine, other = (_part(p, stage_id, ref).value.raw for p in (base, ours, theirs))
        assert _part(merged, stage_id, ref).value.raw == (mine if mine != old else other)


@pytest.mark.parametrize("mode", ["fork", "rebase"])
def test_merge_changes_none_of_its_inputs(mode: str) -> None:
    base, ours, theirs = demo(), demo(), demo()
    actions.sign(ours, "aaf2", "Ana", "reviewer", "accept", time="2026-12-01T10:00:00Z")
    actions.sign(theirs, "adc", "Bo", "reviewer", "accept", time="2026-12-01T11:00:00Z")
    before = [dumps(p) for p in (base, ours, theirs)]
    merge_projects(base, ours, theirs, who="Cy", mode=mode)  # type: ignore[arg-type]
    assert [dumps(p) for p in (base, ours, theirs)] == before
