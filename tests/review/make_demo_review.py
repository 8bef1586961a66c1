"""Write the hydrophone demo's review history through the review API (run once, by hand).

    /work/venv/bin/python tests/review/make_demo_review.py projects/hydrophone.stagewise.json

The reviewers, times and notes are invented for the demo. The history tells one story: the
buffer was approved while its bias resistor was 1 MΩ; it was then raised to the 2.2 MΩ the file
holds now, so that approval is stale. Everything else in the file (parts, checks, settings) is
left exactly as it is: the script refuses to run on a file that already has review records, and
checks at the end that only review records changed.
"""

from __future__ import annotations

import copy
import sys
from typing import Any

from stagewise.files.codec import encode
from stagewise.files.project_file import load_project, save_project
from stagewise.model.project import Project
from stagewise.model.values import Quantity
from stagewise.review import actions
from stagewise.review.audit import unrecorded_decisions, verify_trail

LEAD = ("Maren Holt", "analog design reviewer")
QUALITY = ("Tobias Achebe", "test and quality engineer")


def _without_records(project: Project) -> dict[str, Any]:
    document = encode(project)
    document["audit"] = []
    for stage in document["stages"]:
        stage.pop("signoffs", None)
        stage.pop("comments", None)
        for check in stage.get("checks", []):
            check.pop("answer", None)
            check.pop("waiver", None)
    return document


def build(current: Project) -> Project:
    if current.audit or any(stage.signoffs or stage.comments for stage in current.stages):
        raise SystemExit("the file already has review records; this script writes a fresh history only")
    buffer = current.stage("buffer")
    assert buffer is not None and buffer.part("R1") is not None
    # The design as it was at the first review: the buffer's bias resistor was 1 MΩ.
    earlier = copy.deepcopy(current)
    earlier_buffer = earlier.stage("buffer")
    assert earlier_buffer is not None
    earlier_r1 = earlier_buffer.part("R1")
    assert earlier_r1 is not None
    earlier_r1.value = Quantity.of("1M")

    p = earlier
    actions.answer(p, "buffer", "protect", "yes", LEAD[0],
                   "Low-leakage clamp diodes to the rails behind a series resistor, on sheet 2.",
                   time="2026-11-16T09:12:00Z")
    actions.sign(p, "buffer", *LEAD, "accept", "Follower and input protection reviewed.", time="2026-11-16T09:20:00Z")
    actions.answer(p, "gain", "film", "yes", LEAD[0], "Polyester film part on the BOM.", time="2026-11-16T10:02:00Z")
    actions.sign(p, "gain", *LEAD, "accept", "Gain and coupling corner as intended.", time="2026-11-16T10:05:00Z")
    actions.answer(p, "aaf1", "c0g", "yes", LEAD[0], time="2026-11-16T10:31:00Z")
    actions.sign(p, "aaf1", *LEAD, "accept", time="2026-11-16T10:33:00Z")
    actions.comment(p, "aaf2", QUALITY[0], "Which section comes first on the board? The order check depends on it.",
                    check_id="order", time="2026-11-17T14:40:00Z")

    # The bias resistor is raised to the value the file holds now; saving records the change.
    later = copy.deepcopy(p)
    later_buffer = later.stage("buffer")
    assert later_buffer is not None
    later_r1 = later_buffer.part("R1")
    assert later_r1 is not None
    later_r1.value = buffer.part("R1").value  # type: ignore[union-attr]
    event = actions.record_part_changes(p, later, LEAD[0], time="2026-11-19T08:45:00Z")
    assert event is not None and event.detail["stale_signoffs"], "the change must stale the buffer sign-off"
    p = later

    actions.answer(p, "aaf2", "order", "yes", LEAD[0], "Low-Q section first, sheet 3.", time="2026-11-19T11:10:00Z")
    actions.resolve(p, "aaf2", 0, LEAD[0], time="2026-11-19T11:12:00Z")
    actions.comment(p, "sensor", QUALITY[0],
                    "In chain the buffer bias and the element capacitance put a corner near 21 Hz; "
                    "see the stage notes. 22 MOhm is proposed.", check_id="lf-20hz", time="2026-11-20T09:05:00Z")
    actions.sign(p, "sensor", *QUALITY, "rework",
                 "The 20 Hz check is not met in chain: raise the buffer bias resistor, or show the counter "
                 "does not need 20 Hz.", time="2026-11-20T09:15:00Z")
    actions.answer(p, "sensor", "c-measured", "no", QUALITY[0],
                   "Catalogue value used so far; the batch measurement is planned for the river trial.",
                   time="2026-11-20T09:20:00Z")
    actions.waive(p, "driver", "c0g", *QUALITY,
                  "The trial boards are hand-built with an X7R part; C0G is on the production BOM. "
                  "Accepted for the river trial only.", time="2026-11-20T10:00:00Z")
    actions.sign(p, "driver", *QUALITY, "accept", "Driver and RC reviewed with the waiver on C1.",
                 time="2026-11-20T10:04:00Z")

    if _without_records(p) != _without_records(current):
        raise SystemExit("something other than review records would change; nothing written")
    result = verify_trail(p.audit)
    if not result.intact or unrecorded_decisions(p):
        raise SystemExit(f"the history does not verify: {result.sentence()}")
    return p


def main(path: str) -> None:
    project = build(load_project(path))
    save_project(path, project)
    print(f"{path}: {len(project.audit)} audit events written")


if __name__ == "__main__":
    main(sys.argv[1])
