"""The PDF review packet, read back with pypdf (an independent PDF reader).

Each demo project is given review records of our own (sign-offs, one made stale by a later part
change, a waiver, an answer, comments), saved to a temporary folder and printed once with
``stagewise packet``; the tests then read what the PDF says.
"""

from __future__ import annotations

import hashlib
import json
import re
import shutil
from pathlib import Path
from typing import Any

import pytest

pypdf = pytest.importorskip("pypdf")

from stagewise.cli import main  # noqa: E402
from stagewise.files.project_file import file_sha256, load_project, save_project  # noqa: E402
from stagewise.model.values import Quantity  # noqa: E402
from stagewise.review import actions  # noqa: E402
from stagewise.review.audit import EVENT_LABELS, verify_trail  # noqa: E402
from stagewise.review.checks import CheckResult  # noqa: E402
from stagewise.review.signoff import signoff_states  # noqa: E402
from stagewise.review.words import CheckState  # noqa: E402

PROJECTS = Path(__file__).resolve().parents[2] / "projects"
CAUTION_PHRASES = (
    # DESIGN section 9: the cautions every packet must carry.
    "does not assess electrical safety",
    "IEC 61010-1",
    "IEC 60601-1",
    "Verify every design on hardware.",
)
TIME = "2026-11-30T09:00:00Z"


def _normal(text: str) -> str:
    """Whitespace as single spaces (pypdf writes word gaps as tabs and lines as newlines).

    Qt writes a Greek letter (Ω, µ) as its own text run, and pypdf reads the run change as a
    gap; such gaps are removed on both sides of every comparison.
    """
    return re.sub(r"\s+([Ωµ])", r"\1", re.sub(r"\s+", " ", text))


def _review(project_path: Path) -> dict[str, Any]:
    """Give the project review records; returns what the tests expect to find."""
    project = load_project(project_path)
    first, second = project.stages[0], project.stages[1]
    actions.sign(project, first.id, "Ada Reviewer", "analog lead", "accept", "looked fine", time=TIME)
    actions.sign(project, second.id, "Ben Checker", "test engineer", "accept", "bench-checked", time=TIME)
    actions.comment(project, second.id, "Ben Checker", "Bench result attached to the ticket.", time=TIME)
    manual = next((check for stage in project.stages for check in stage.checks if check.metric is None), None)
    if manual is not None:
        stage = next(stage for stage in project.stages if manual in stage.checks)
        actions.answer(project, stage.id, manual.id, "yes", "Ada Reviewer", "measured", time=TIME)
    numeric = next(check for check in project.stages[-1].checks if check.metric is not None)
    actions.waive(project, project.stages[-1].id, numeric.id, "Ada Reviewer", "analog lead",
                  "accepted for the prototype build", time=TIME)
    # A later part change makes the first stage's sign-off stale.
    part = next(part for part in first.parts if part.type in ("R", "C")) if first.parts else None
    if part is not None and part.value is not None:
        part.value = Quantity(part.value.si * 1.1, part.value.si * 1.1)
    save_project(project_path, project)
    return {"stale_stage": first.id if part is not None else None, "current_stage": second.id}


@pytest.fixture(scope="module", params=["hydrophone", "greenhouse"])
def printed(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    folder = tmp_path_factory.mktemp(request.param)
    path = folder / f"{request.param}.stagewise.json"
    shutil.copyfile(PROJECTS / f"{request.param}.stagewise.json", path)
    expected = _review(path)
    sha_before = file_sha256(path)
    project_before = load_project(path)
    output = folder / "packet.pdf"
    status = main(["packet", str(path), "-o", str(output), "--by", "Quality Office"])
    assert status == 0
    reader = pypdf.PdfReader(str(output))
    pages = [page.extract_text() for page in reader.pages]
    return {"path": path, "output": output, "reader": reader, "pages": pages, "text": _normal(" ".join(pages)),
            "sha_before": sha_before, "project": project_before, **expected}


def _section(printed: dict[str, Any], start: str, end: str | None) -> str:
    text = printed["text"]
    begin = text.index(start)
    finish = text.index(end, begin) if end is not None else len(text)
    return text[begin:finish]


def _stage_heading(number: int, name: str) -> str:
    return f"Stage {number}: {name}"


def test_every_stage_has_its_section(printed: dict[str, Any]) -> None:
    # Common practice, no source: a review packet covers every stage of the chain.
    for number, stage in enumerate(printed["project"].stages, start=1):
        assert _normal(_stage_heading(number, stage.name)) in printed["text"]


def test_cover_names_the_full_sha256_of_the_file_it_was_printed_from(printed: dict[str, Any]) -> None:
    # Reference library: hashlib (Python standard library), sha256 of the file's bytes before printing.
    cover = _normal(printed["pages"][0])
    assert printed["sha_before"] in cover
    assert printed["project"].title.split()[0] in cover


def test_every_page_says_page_n_of_m(printed: dict[str, Any]) -> None:
    total = len(printed["pages"])
    assert total > 3
    for number, text in enumerate(printed["pages"], start=1):
        assert f"page {number} of {total}" in _normal(text)


def test_cautions_are_present(printed: dict[str, Any]) -> None:
    # Source: DESIGN.md section 9 (the cautions every packet carries).
    for phrase in CAUTION_PHRASES:
        assert _normal(phrase) in printed["text"]


def test_plots_are_vectors_without_embedded_images(printed: dict[str, Any]) -> None:
    # Source: ISO 32000-1:2008 (PDF 1.7), 8.8 and 8.10: raster images are Image XObjects, also inside Forms.
    def images_in(resources: Any) -> int:
        count = 0
        xobjects = resources.get("/XObject") if resources is not None else None
        if xobjects is None:
            return 0
        for item in xobjects.get_object().values():
            obj = item.get_object()
            if obj.get("/Subtype") == "/Image":
                count += 1
            elif obj.get("/Subtype") == "/Form":
                count += images_in(obj.get("/Resources"))
        return count

    for page in printed["reader"].pages:
        assert images_in(page.get("/Resources")) == 0
    # The response plots are there as drawn paths with their axis text.
    assert "frequency (Hz)" in printed["text"]
    plot_page = next(index for index, text in enumerate(printed["pages"]) if "frequency (Hz)" in _normal(text))
    contents = printed["reader"].pages[plot_page].get_contents().get_data()
    assert contents.count(b" l\n") + contents.count(b" c\n") > 200  # line and curve segments


def test_stale_signoff_is_marked(printed: dict[str, Any]) -> None:
    project = printed["project"]
    stages = project.stages
    numbers = {stage.id: index for index, stage in enumerate(stages, start=1)}

    def stage_text(stage_id: str) -> str:
        number = numbers[stage_id]
        stage = stages[number - 1]
        following = _normal(_stage_heading(number + 1, stages[number].name)) if number < len(stages) else "Audit trail"
        return _section(printed, _normal(_stage_heading(number, stage.name)), following)

    # By construction: Ada signed the first stage and a part changed afterwards (stale); Ben
    # signed the second stage as it is (current).
    if printed["stale_stage"] is not None:
        stale = stage_text(printed["stale_stage"])
        assert f"Ada Reviewer analog lead {TIME} OUT OF DATE" in stale
    current = stage_text(printed["current_stage"])
    assert f"Ben Checker test engineer {TIME} accepted" in current
    assert "Bench result attached to the ticket." in current
    # Every other sign-off in the demo file: marked exactly when the review layer calls it stale.
    for stage_id, state in signoff_states(project).items():
        text = stage_text(stage_id)
        for view in state.signoffs:
            signoff = view.signoff
            row_start = _normal(f"{signoff.name} {signoff.role} {signoff.time} ")
            assert row_start in text
            following = text[text.index(row_start) + len(row_start):]
            assert following.startswith("OUT OF DATE") == view.out_of_date, (stage_id, signoff.name)


def test_check_values_and_states_match_the_check_command(printed: dict[str, Any],
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    # The packet and `stagewise check --json` must say the same for every check (DESIGN 6 and 8).
    path = printed["path"]
    main(["check", str(path), "--json"])
    document = json.loads(capsys.readouterr().out)
    stages = printed["project"].stages
    for number, stage in enumerate(stages, start=1):
        following = _normal(_stage_heading(number + 1, stages[number].name)) if number < len(stages) else "Audit trail"
        section = _section(printed, _normal(_stage_heading(number, stage.name)), following)
        checks_at = section.index("Checks check metric limits value status reason")
        mine = [item for item in document["checks"] if item["stage"] == stage.id]
        position = checks_at
        for index, item in enumerate(mine):
            start = section.index(item["id"], position)
            end = section.index(mine[index + 1]["id"], start + len(item["id"])) if index + 1 < len(mine) else len(section)
            row = section[start:end]
            shown = CheckResult(stage.id, item["id"], item["text"], item["metric"], item["where"], item["at_hz"],
                                item["value"], item["unit"], item["limits"], CheckState(item["state"]),
                                item["why"]).value_text()
            expected = " ".join(part for part in (item["limits"] or "—", shown, item["state"]) if part)
            assert _normal(expected) in row, (item["id"], row)
            position = start + len(item["id"])


def test_audit_events_are_listed(printed: dict[str, Any]) -> None:
    trail = _section(printed, "Audit trail", None)
    events = printed["project"].audit
    assert events, "the fixture records events"
    for event in events:
        assert f"{event.seq} {event.time}" in trail
        assert _normal(EVENT_LABELS.get(event.what, event.what)) in trail
    assert "audit trail intact" in trail.lower()


def test_printing_is_recorded_with_the_packets_own_sha256(printed: dict[str, Any]) -> None:
    # Reference library: hashlib (Python standard library), sha256 of the PDF's bytes.
    project = load_project(printed["path"])
    last = project.audit[-1]
    assert last.what == "packet"
    assert last.who == "Quality Office"
    assert last.detail["packet_sha256"] == hashlib.sha256(printed["output"].read_bytes()).hexdigest()
    assert last.detail["file_sha256"] == printed["sha_before"]
    assert verify_trail(project.audit).intact
    assert len(project.audit) == len(printed["project"].audit) + 1


def test_chain_figures_match_analyze_json(printed: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    # The packet takes every number from the `analyze --json` document (DESIGN 6 and 8).
    from stagewise.model.values import format_value

    main(["analyze", str(printed["path"]), "--json"])
    chain = json.loads(capsys.readouterr().out)["chain"]
    text = printed["text"]
    assert _normal(f"Gain {chain['gain_db']:.4g} dB") in text
    assert _normal(f"Upper −3 dB corner {format_value(chain['f_high_3db_hz'], 'Hz')}") in text
    noise = chain["noise"]
    assert _normal(f"Output noise (RMS) {format_value(noise['out_rms_v'], 'V')}") in text
    converter = chain["converter"]
    assert _normal(f"SNR, chain and quantization noise against full-scale sine {converter['snr_db']:.4g} dB") in text
    if chain["spread"]["yield_pct"] is not None:
        assert _normal(f"Yield against the checks {chain['spread']['yield_pct']:.4g} %") in text


def test_cover_warns_of_every_automatic_finding(printed: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    # The findings `check` lists (instability, over-range, clipping, slew) stand on the cover.
    main(["check", str(printed["path"]), "--json"])
    findings = json.loads(capsys.readouterr().out)["findings"]
    cover = _normal(printed["pages"][0])
    if not findings:
        assert "WARNING" not in cover
        return
    assert "WARNING" in cover
    for item in findings:
        assert _normal(item["text"]) in cover


def test_stage_pages_show_the_pass_band_reference_from_input_figures_and_loops_in_chain(
        printed: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: a figure names the reference it was taken against, the chain seen from
    # its input sits beside isolated and in chain, and an op-amp's loop in chain sits beside its loop
    # alone. The numbers come from the `analyze --json` document (DESIGN 6 and 8).
    from stagewise.engine.metrics import reference_words
    from stagewise.model.values import format_value

    main(["analyze", str(printed["path"]), "--json"])
    stages = json.loads(capsys.readouterr().out)["stages"]
    text = printed["text"]
    assert "from chain input" in text
    assert _normal("Pass-band reference (corners, peaking)") in text
    # Common practice, no source: the chain seen from its input is drawn with the stage where it has the
    # stage's unit (a voltage-driven chain), else the page says where its figures are.
    if printed["project"].input.drive == "voltage":
        assert "; from chain input:" in text  # a third trace in the caption's legend
    else:
        assert _normal("not in this plot's V/V") in text
    for entry in stages:
        seen = entry.get("from_input")
        if isinstance(seen, dict) and seen.get("f_high_3db_hz") is not None:
            assert _normal(format_value(seen["f_high_3db_hz"], "Hz")) in text
        isolated = entry.get("isolated")
        if isinstance(isolated, dict):
            unit = "dBΩ" if isolated["unit"] == "Ω" else "dB"
            assert _normal(reference_words(isolated["ref"], unit)) in text
    with_loops = [entry for entry in stages if isinstance(entry.get("in_chain"), dict) and entry["in_chain"]["loops"]]
    assert with_loops
    assert _normal("phase margin in chain") in text
    for entry in with_loops:
        for loop in entry["in_chain"]["loops"]:
            if loop.get("phase_margin_deg") is not None:
                assert f"{loop['phase_margin_deg']:.4g}°" in text


def test_gains_carry_the_unit_of_their_place_and_say_where_they_are_read(
        printed: dict[str, Any], capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: a transimpedance (V/A) in decibels is dBΩ (re 1 V/A), a voltage
    # ratio plain dB; a gain printed as "126 dB" beside a reference in dBΩ would mix the two.
    main(["analyze", str(printed["path"]), "--json"])
    document = json.loads(capsys.readouterr().out)
    text = printed["text"]
    chain = document["chain"]
    unit = "dBΩ" if chain["unit"] == "Ω" else "dB"
    assert _normal(f"Gain at the reference frequency 1 kHz {chain['gain_db']:.4g} {unit}") in text
    assert _normal(f"Peak gain {chain['peak_gain_db']:.4g} {unit}") in text
    for entry in document["stages"]:
        isolated = entry.get("isolated")
        if isinstance(isolated, dict) and isinstance(isolated.get("gain_db"), float):
            unit = "dBΩ" if isolated["unit"] == "Ω" else "dB"
            # the block diagram's figure of each stage, isolated
            assert _normal(f"gain {round(isolated['gain_db'], 2) + 0.0:+.2f} {unit}") in text
