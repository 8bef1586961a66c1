"""Semantic diff: part by part, values as typed, and the sign-offs a change makes stale."""

from __future__ import annotations

import copy

from review_helpers import base_document, base_project, project_from

from stagewise.model.project import Part, Stage
from stagewise.model.values import Quantity
from stagewise.review import actions
from stagewise.review.diff import diff_projects

T = "2026-11-03T10:00:00Z"


def test_identical_projects_have_no_differences() -> None:
    result = diff_projects(base_project(), base_project())
    assert result.empty and result.lines() == ["no differences"]


def test_reordered_keys_and_retyped_equal_values() -> None:
    document = base_document()
    document["stages"][0]["parts"][0]["value"] = 3300
    result = diff_projects(base_project(), project_from(document))
    assert [change.sentence() for change in result.changes] == [
        "stage rc, part R1: value changed 3k3 → 3300 (same value, typed differently)"]
    assert result.stale == ()


def test_part_changes_and_the_stale_signoff_are_named() -> None:
    old = base_project()
    actions.sign(old, "rc", "Ana Ruiz", "analog lead", "accept", time=T)
    actions.sign(old, "buf", "Ben Okafor", "quality", "accept", time=T)
    new = copy.deepcopy(old)
    rc = new.stage("rc")
    assert rc is not None
    rc.parts[1].value = Quantity.of("5n6")
    rc.parts.append(Part(ref="R9", type="R", nodes=["out", "0"], value=Quantity.of("1Meg")))
    del new.stages[1].parts[0]
    new.stages[1].parts.append(Part(ref="R3", type="R", nodes=["in", "0"], value=Quantity.of("47k")))
    rc.checks[0].min = Quantity.of("8k")
    result = diff_projects(old, new)
    lines = result.lines()
    assert "stage rc, part C1: value changed 4n7 → 5n6" in lines
    assert "stage rc, part R9: added (R out 0 1Meg)" in lines
    assert "stage rc, check corner: min changed 9k → 8k" in lines
    assert "stage buf, part R2: removed (R in 0 100k)" in lines
    assert "stage buf, part R3: added (R in 0 47k)" in lines
    assert {(item.stage_id, item.name) for item in result.stale} == {("rc", "Ana Ruiz"), ("buf", "Ben Okafor")}
    assert any(line.strip().startswith("out of date: stage rc, accepted by Ana Ruiz") for line in lines)


def test_signoff_not_staled_by_prose_and_already_stale_not_repeated() -> None:
    old = base_project()
    actions.sign(old, "rc", "Ana Ruiz", "analog lead", "accept", time=T)
    new = copy.deepcopy(old)
    new.stages[0].name = "Input RC"
    result = diff_projects(old, new)
    assert result.stale == ()
    assert "no sign-off is made out of date by these changes" in result.lines()
    # A sign-off that was stale before the change is not reported as made stale by it.
    old.stages[0].signoffs[0].fingerprint = "0" * 64
    new.stages[0].signoffs[0].fingerprint = "0" * 64
    new.stages[0].parts[0].value = Quantity.of("3k9")
    assert diff_projects(old, new).stale == ()


def test_stages_added_removed_and_moved() -> None:
    old = base_project()
    old.stages.append(Stage(id="tail", name="Tail", parts=[Part("R5", "R", ["in", "out"], Quantity.of("1k")),
                                                          Part("R6", "R", ["out", "0"], Quantity.of("1k"))]))
    new = copy.deepcopy(old)
    new.stages = [new.stages[2], new.stages[0]]  # tail moved first, buf removed
    new.stages.append(Stage(id="extra", name="Extra"))
    sentences = [change.sentence() for change in diff_projects(old, new).changes]
    assert "stage buf: removed (Buffer)" in sentences
    assert "stage extra: added (Extra)" in sentences
    moved = [line for line in sentences if ": moved from" in line]
    assert len(moved) == 1 and moved[0] in ("stage tail: moved from position 3 to position 1",
                                            "stage rc: moved from position 1 to position 2")


def test_model_parameter_change_is_listed_and_stales_the_stage_using_it() -> None:
    old = base_project()
    actions.sign(old, "buf", "Ben Okafor", "quality", "accept", time=T)
    new = copy.deepcopy(old)
    new.opamp_models["test-5M"].gbw_hz = Quantity.of("8M")
    result = diff_projects(old, new)
    assert "op-amp model test-5M: gbw_hz changed 5M → 8M" in result.lines()
    assert [item.stage_id for item in result.stale] == ["buf"]


def test_records_added_and_removed_are_matched_by_identity() -> None:
    # Common practice, no source: a record is the same record when who, when and what agree.
    old = base_project()
    actions.sign(old, "rc", "Ana Ruiz", "analog lead", "rework", note="Raise R1.", time=T)
    new = copy.deepcopy(old)
    actions.sign(new, "buf", "Ben Okafor", "quality", "accept", time=T)
    actions.comment(new, "rc", "Ben Okafor", "Which package?", time=T)
    new.stage("rc").signoffs.clear()  # type: ignore[union-attr]
    result = diff_projects(old, new)
    assert not result.empty
    # In chain order: stage rc before stage buf.
    assert [(r.kind, r.stage_id, r.who) for r in result.records_added] == [("comment", "rc", "Ben Okafor"),
                                                                          ("sign-off", "buf", "Ben Okafor")]
    assert [(r.kind, r.stage_id, r.who) for r in result.records_removed] == [("sign-off", "rc", "Ana Ruiz")]
    assert result.changes == ()  # records are not design changes


def test_bench_measurements_added_and_removed_are_review_records() -> None:
    # Common practice, no source: attaching or deleting evidence of a bench test is a change to
    # the review that a reviewer comparing two revisions must be told about.
    from stagewise.files.measurements import parse_measurement
    from stagewise.review.measurements import attach_measurement

    old = base_project()
    data = parse_measurement(b"f_hz,gain_db,phase_deg\n100,0,-1\n1000,-0.5,-9\n", "board.csv")
    new = copy.deepcopy(old)
    attach_measurement(new, data, "isolated", "rc", "Ben Okafor", measurement_id="board", time=T)
    attach_measurement(new, data, "chain", None, "Ana Ruiz", measurement_id="whole", time=T)
    added = diff_projects(old, new).records_added
    assert [(r.kind, r.stage_id, r.who) for r in added] == [("bench measurement", "rc", "Ben Okafor"),
                                                             ("bench measurement", None, "Ana Ruiz")]
    assert added[1].sentence().startswith("the whole chain: bench measurement by Ana Ruiz")
    removed = diff_projects(new, old).records_removed
    assert [r.who for r in removed] == ["Ben Okafor", "Ana Ruiz"]


def test_a_record_edited_in_place_is_listed_removed_and_added() -> None:
    # Common practice, no source: a reviewer comparing two revisions is told of every review
    # record whose content differs, even when who, when and what are unchanged (a note edited).
    old = base_project()
    actions.sign(old, "rc", "Ana Ruiz", "analog lead", "rework", note="Raise R1.", time=T)
    actions.comment(old, "rc", "Ben Okafor", "Which package?", time=T)
    new = copy.deepcopy(old)
    new.stage("rc").signoffs[0].note = "Raise R1 to 5k1."  # type: ignore[union-attr]
    result = diff_projects(old, new)
    assert not result.empty
    assert [(r.kind, r.summary) for r in result.records_removed] == [("sign-off", "returned for rework, analog lead: "
                                                                       "Raise R1. (edited)")]
    assert [(r.kind, r.summary) for r in result.records_added] == [("sign-off", "returned for rework, analog lead: "
                                                                     "Raise R1 to 5k1. (edited)")]
    # Resolving a comment through the program adds its resolution; the comment itself is not "edited".
    resolved = copy.deepcopy(old)
    resolved.stage("rc").comments[0].resolved = True  # type: ignore[union-attr]
    result = diff_projects(old, resolved)
    assert [r.kind for r in result.records_added] == ["resolution"] and result.records_removed == ()


def test_removed_stage_counts_its_signoffs_in_good_english() -> None:
    # Common practice, no source: one sign-off, two sign-offs (English plural rule).
    old = base_project()
    actions.sign(old, "buf", "Ana Ruiz", "analog lead", "accept", time=T)
    new = copy.deepcopy(old)
    new.stages = [stage for stage in new.stages if stage.id != "buf"]
    assert "stage buf: removed (Buffer, 1 sign-off with it)" in [c.sentence() for c in diff_projects(old, new).changes]
    actions.sign(old, "buf", "Ben Okafor", "quality", "accept", time=T)
    assert "stage buf: removed (Buffer, 2 sign-offs with it)" in [c.sentence() for c in diff_projects(old, new).changes]
