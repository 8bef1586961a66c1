"""The packet's sections, in order (DESIGN section 8), as blocks for :mod:`stagewise.report.layout`.

Cover, cautions, the chain (block diagram, response, noise, converter, headroom, spread), one
section per stage, the audit trail. Numbers come from the analysis document
(:class:`~stagewise.report.content.PacketContent`); check states from
:mod:`stagewise.review.checks`; sign-off states from :mod:`stagewise.review.signoff`; every word
for a state, a metric or an event from the review layer's tables, so the GUI, the packet and the
command line say the same thing.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from datetime import UTC, datetime
from typing import Any

import shiboken6
from PySide6.QtCore import QRectF
from PySide6.QtGui import QColor, QPainter

from stagewise import __version__
from stagewise.engine.metrics import reference_words
from stagewise.model.project import PART_TYPES, Project, Stage
from stagewise.model.values import format_value
from stagewise.present.formula import finite_gain_lines, polynomial, pretty
from stagewise.present.limits import LimitShape, limit_shapes, peaking_level, peaking_reference_db
from stagewise.present.loops import loop_summary
from stagewise.report.content import NOT_IN_BUILD, Curve, PacketContent
from stagewise.report.diagram import DiagramBox, diagram_height, draw_diagram
from stagewise.report.layout import (
    MUTED,
    Block,
    Column,
    Figure,
    Heading,
    PageBreak,
    Paragraph,
    Spacer,
    Table,
)
from stagewise.report.measurements import measurement_blocks
from stagewise.report.plots import (
    PlotCanvas,
    ResponseTrace,
    active_canvas,
    bars_plot,
    legend_text,
    loop_gain_plot,
    pole_zero_caption,
    pole_zero_plot,
    render_plot,
    response_plot,
    step_plot,
    trace_from_complex,
)
from stagewise.review.audit import EVENT_LABELS, verify_trail
from stagewise.review.checks import FINDING_WORDS, CheckResult, CheckTotals, automatic_findings, totals
from stagewise.review.metrics import METRICS
from stagewise.review.signoff import StageSignoffs
from stagewise.review.words import (
    FIELD_WORDS,
    REPLACED_WORD,
    SIGNOFF_STATE_MEANINGS,
    VERDICT_WORDS,
    WHERE_WORDS,
    CheckState,
    SignoffState,
    current_verdict,
)

__all__ = ["CAUTIONS", "build_blocks"]

# DESIGN section 9, word for word: shown in the README, the About box and every packet.
CAUTIONS = (
    "Stagewise analyses small-signal linear models. It does not model large-signal behaviour beyond "
    "the swing and slew checks, and it does not assess electrical safety: insulation, creepage and "
    "clearance, leakage currents, protection against fault conditions. Front-ends that touch mains, "
    "patients or hazardous energy must follow the applicable standards (for example IEC 61010-1 for "
    "measurement equipment and IEC 60601-1 for medical equipment), local codes and the judgement of a "
    "qualified, where required licensed, engineer. Verify every design on hardware."
)

AUDIT_MEANING = (
    "Each event's hash is the SHA-256 of its content and of the hash before it. Recomputing the chain "
    "reveals events edited, removed, inserted or reordered outside the program. It is not a signature: "
    "anyone holding the file can rebuild a chain that verifies."
)

DASH = "—"
FINDING_COLOUR = "#8a1c00"  # the layout's colour of a "bad" table row


def _text(value: Any, unit: str = "") -> str:
    """A metric value for people: SI prefix for physical units, plain digits for dB, degrees and %."""
    if value is None:
        return DASH
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int | float):
        number = float(value)
        if not math.isfinite(number):
            return DASH
        if unit in ("dB", "dBΩ", "%", ""):
            return f"{number:.4g} {unit}".rstrip()
        if unit == "°":
            return f"{number:.4g}°"
        return format_value(number, unit)
    return str(value)


def _why(document: dict[str, Any] | None, key: str) -> str | None:
    """The reason a value is null, wherever the analysis document put it."""
    if not document:
        return None
    for candidate in (f"{key}_why", "why"):
        found = document.get(candidate)
        if isinstance(found, str):
            return found
        if isinstance(found, dict) and isinstance(found.get(key), str):
            return str(found[key])
    inner = document.get(key)
    if isinstance(inner, dict) and isinstance(inner.get("why"), str):
        return str(inner["why"])
    return None


def _value_or_why(document: dict[str, Any] | None, key: str, unit: str) -> str:
    if document is None:
        return DASH
    value = document.get(key)
    if value is None or isinstance(value, dict | list):
        why = _why(document, key)
        return f"{DASH} ({why})" if why else DASH
    return _text(value, unit)


def _label(text: str) -> Paragraph:
    """A bold line that introduces the block after it, kept on the same page as that block."""
    label = Paragraph(text, 11.5, bold=True, space_after=2.0)
    label.keep_with_next = True
    return label


def _intro(text: str) -> Paragraph:
    """A sentence that introduces a table, kept on the same page as the table."""
    intro = Paragraph(text, 11.0, space_after=3.0)
    intro.keep_with_next = True
    return intro


def _unavailable(text: str) -> Paragraph:
    return Paragraph(text, 11.5, italic=True, color=QColor(MUTED))


def _key_values(rows: Sequence[tuple[str, str]], size_px: float = 11.5) -> Table:
    return Table([Column("", wrap=False), Column("")], [list(row) for row in rows], size_px=size_px, header=False)


def _plot_figure(build: Callable[[PlotCanvas | None], Any], height: float, caption: str) -> Figure:
    """A figure painted by ``build(canvas)``: in the shared frames of the packet's canvas while the
    pages are painted (:func:`stagewise.report.plots.using_canvas`), else in a canvas of its own."""
    def draw(painter: QPainter, rect: QRectF) -> None:
        canvas = active_canvas()
        if canvas is None:
            with PlotCanvas() as own:
                _render_built(build, own, painter, rect)
        else:
            _render_built(build, canvas, painter, rect)

    return Figure(draw, height, caption)


def _render_built(build: Callable[[PlotCanvas | None], Any], canvas: PlotCanvas, painter: QPainter,
                  rect: QRectF) -> None:
    widget = build(canvas)
    try:
        render_plot(widget, painter, rect)
    finally:
        if not canvas.owns(widget):
            # A plot built without the canvas: destroy it now, as without an event loop
            # deleteLater() never runs, and Qt objects left for interpreter shutdown can crash it.
            shiboken6.delete(widget)


def _traces(curves: Sequence[tuple[str, Curve]]) -> list[ResponseTrace]:
    return [trace_from_complex(label, curve.f_hz, curve.response) for label, curve in curves
            if curve.f_hz is not None and curve.response is not None]


# --- cover -------------------------------------------------------------------------------------


def _cover(content: PacketContent, results: list[CheckResult], states: dict[str, StageSignoffs],
           printed_utc: str) -> list[Block]:
    project = content.project
    settings = project.settings
    counts: CheckTotals = totals(results)
    blocks: list[Block] = [
        Paragraph("DESIGN REVIEW PACKET", 11.0, bold=True, color=QColor(MUTED), space_after=8.0),
        Heading(project.title, 0),
        Paragraph(f"Revision {project.revision or DASH}", 15.0, space_after=14.0),
    ]
    bypassed = sum(1 for stage in project.stages if stage.bypass)
    band = (f"{format_value(settings.f_min_hz.si, 'Hz')} to {format_value(settings.f_max_hz.si, 'Hz')}, "
            f"{settings.points_per_decade} points per decade")
    rows = [
        ("Project file", content.source_name),
        ("File SHA-256", content.sha256),
        ("Printed", printed_utc),
        ("Printed with", f"Stagewise {__version__}"),
        ("Stages", f"{len(project.stages)} ({bypassed} bypassed)" if bypassed else str(len(project.stages))),
        ("Analysis band", band),
        ("Reference frequency", format_value(settings.ref_hz.si, "Hz") if settings.ref_hz else "band maximum"),
        ("Temperature", f"{settings.temperature_c.si:g} °C"),
    ]
    table = _key_values(rows)
    table.columns[1] = Column("", mono=False)
    blocks.append(table)
    blocks.append(Paragraph(
        "The SHA-256 above identifies the exact project file this packet was printed from: compute the "
        "SHA-256 of a file to know whether it is the one reviewed here.", 10.5, italic=True, color=QColor(MUTED),
        space_after=12.0))
    blocks.append(Heading("Checks", 2))
    blocks.append(Table(
        [Column("met", "right"), Column("not met", "right"), Column("waived", "right"), Column("open", "right"),
         Column("no value", "right"), Column("n/a", "right"), Column("total", "right")],
        [[str(counts.met), str(counts.not_met), str(counts.waived), str(counts.open), str(counts.no_value),
          str(counts.not_applicable), str(counts.total)]], size_px=12.0))
    findings = list(automatic_findings(content.provider))
    verdict = ("The chain has no checks yet: nothing here is verified against a limit." if counts.total == 0 else
               "Every check is met, waived or not applicable." if counts.all_passing else
               "Not every check passes: see the checks of each stage for values and reasons.")
    blocks.append(Paragraph(verdict, 11.5, space_after=10.0))
    if findings:
        blocks.append(Paragraph(
            f"WARNING: {len(findings)} automatic finding{'s' if len(findings) != 1 else ''} fail this design "
            "whatever its checklist says (found by the analysis, not waivable):", 11.5, bold=True,
            color=QColor(FINDING_COLOUR), space_after=4.0))
        blocks.append(Table([Column("finding", wrap=False), Column("what")],
                            [[FINDING_WORDS.get(item.kind, item.kind), item.sentence] for item in findings],
                            size_px=10.5, row_marks=["bad"] * len(findings)))
    blocks.append(Heading("Sign-off state of each stage", 2))
    rows_signed = []
    marks = []
    for stage in project.stages:
        state = states[stage.id]
        latest = [view for view in state.signoffs if not view.replaced]
        who = "; ".join(f"{view.signoff.name} ({view.word}, {view.signoff.time[:10]})" for view in latest) or DASH
        name = stage.name + (" (bypassed)" if stage.bypass else "")
        word = str(state.state).upper() if state.state == SignoffState.OUT_OF_DATE else str(state.state)
        rows_signed.append([stage.id, name, word, who])
        marks.append("bad" if state.state in (SignoffState.OUT_OF_DATE, SignoffState.REWORK)
                     else "muted" if stage.bypass else "")
    blocks.append(Table([Column("stage", wrap=False), Column("name"), Column("state", wrap=False),
                         Column("latest sign-off of each reviewer")], rows_signed, row_marks=marks))
    blocks.append(Paragraph("; ".join(f"{state}: {meaning}" for state, meaning in SIGNOFF_STATE_MEANINGS.items())
                            + ".", 10.0, italic=True, color=QColor(MUTED)))
    return blocks


# --- cautions ----------------------------------------------------------------------------------


def _cautions(content: PacketContent) -> list[Block]:
    blocks: list[Block] = [PageBreak(), Heading("Cautions", 1), Paragraph(CAUTIONS, 12.5, space_after=12.0)]
    blocks.append(Heading("How to read this packet", 2))
    blocks.append(Paragraph(
        "Isolated: the stage alone, driven by an ideal source, output unloaded. In chain: the stage where it "
        "sits, driven by the stages before it and loaded by the stages after it. Check states are computed "
        "from the analysis when the packet is printed, never stored. A sign-off is bound to the fingerprint "
        f"of the stage it was given to; it is marked {str(SignoffState.OUT_OF_DATE).upper()} when the stage has "
        f"changed since, and {REPLACED_WORD} when the same reviewer signed the stage again later.", 11.5))
    if content.analysis is None:
        blocks.append(_unavailable(
            f"In this packet the computed figures are missing because {content.analysis_why}. The sections "
            f"say so where a number would stand; no number has been estimated in its place."))
    return blocks


# --- the chain ---------------------------------------------------------------------------------


def _stage_figures(entry: dict[str, Any] | None) -> tuple[str, ...]:
    """Gain at the reference frequency and the −3 dB band, isolated, for a diagram box."""
    if entry is None or not isinstance(entry.get("isolated"), dict):
        return ("no figures in this build",)
    isolated = entry["isolated"]
    lines = []
    gain = isolated.get("gain_db")
    if isinstance(gain, int | float):
        lines.append(f"gain {round(gain, 2) + 0.0:+.2f} {_place_unit(isolated, 'dB')}")  # + 0.0: no "-0.00"
    low, high = isolated.get("f_low_3db_hz"), isolated.get("f_high_3db_hz")
    if isinstance(low, int | float) or isinstance(high, int | float):
        low_text = format_value(low, "Hz", 3) if isinstance(low, int | float) else "DC"
        high_text = format_value(high, "Hz", 3) if isinstance(high, int | float) else "above band"
        lines.append(f"{low_text} – {high_text}")
    return tuple(lines)


def _diagram_boxes(content: PacketContent) -> list[DiagramBox]:
    project = content.project
    amplitude = project.input.amplitude
    unit = "A" if project.input.drive == "current" else "V"
    source = DiagramBox("Source", f"{project.input.drive} drive",
                        (f"{format_value(amplitude.si, unit)} peak",) if amplitude else (), end=True)
    boxes = [source]
    for stage in project.stages:
        kind = "block" if stage.is_block else f"{len(stage.parts)} part{'s' if len(stage.parts) != 1 else ''}"
        if stage.bypass:
            boxes.append(DiagramBox(stage.name, f"{stage.id} · bypassed", (), bypassed=True))
        else:
            boxes.append(DiagramBox(stage.name, f"{stage.id} · {kind}", _stage_figures(content.stage_analysis(stage.id))))
    converter = project.converter
    figures = []
    if converter.bits:
        figures.append(f"{converter.bits} bit")
    if converter.fs_hz:
        figures.append(f"fs {format_value(converter.fs_hz.si, 'Hz', 3)}")
    if converter.full_scale_vpp:
        figures.append(f"{format_value(converter.full_scale_vpp.si, 'V', 3)} p-p full scale")
    if project.load.r_ohm or project.load.c_f:
        load = " ∥ ".join(text for text in (
            format_value(project.load.r_ohm.si, "Ω", 3) if project.load.r_ohm else "",
            format_value(project.load.c_f.si, "F", 3) if project.load.c_f else "") if text)
        figures.append(f"load {load}")
    boxes.append(DiagramBox("Converter" if converter.bits or converter.fs_hz else "Output", "end of chain",
                            tuple(figures[:3]), end=True))
    return boxes


_CHAIN_KEYS = ("gain_db", "peak_gain_db", "peaking_db", "f_low_3db_hz", "f_high_3db_hz")


def _reference_cell(document: dict[str, Any] | None) -> str:
    """The pass-band reference of an "M" document in the same few words as every view."""
    if not isinstance(document, dict) or not isinstance(document.get("ref"), dict):
        return DASH
    return reference_words(document["ref"], "dBΩ" if document.get("unit") == "Ω" else "dB")


def _place_unit(document: dict[str, Any] | None, unit: str) -> str:
    """A gain's unit where the place is a transimpedance (unit Ω): dB becomes dBΩ (re 1 V/A), V/V becomes Ω."""
    if not isinstance(document, dict) or document.get("unit") != "Ω":
        return unit
    return {"dB": "dBΩ", "": "Ω"}.get(unit, unit)


def _metrics_rows(documents: Sequence[dict[str, Any] | None]) -> list[list[str]]:
    rows = [["Pass-band reference (corners, peaking)"] + [_reference_cell(document) for document in documents]]
    ref_hz = next((document.get("ref_hz") for document in documents if isinstance(document, dict)), None)
    for key in _CHAIN_KEYS:
        unit = METRICS[key].unit
        label = METRICS[key].label
        if key == "gain_db" and isinstance(ref_hz, int | float):
            label = f"Gain at the reference frequency {format_value(float(ref_hz), 'Hz')}"
        elif key == "gain_db":
            label = "Gain (the pass-band reference gain; no reference frequency set)"
        rows.append([label] + [_value_or_why(document, key, _place_unit(document, unit) if key != "peaking_db"
                                             else unit) for document in documents])
    step_keys = (("rise_s", "s"), ("overshoot_pct", "%"), ("settle_1pct_s", "s"))
    for key, unit in step_keys:
        rows.append([METRICS[key].label] + [
            _value_or_why(document.get("step") if isinstance(document, dict) and isinstance(document.get("step"), dict)
                          else None, key, unit) if document is not None else DASH
            for document in documents])
    rows.append(["Step final value (per unit step)"] + [
        _value_or_why(document.get("step") if isinstance(document, dict) and isinstance(document.get("step"), dict)
                      else None, "final", _place_unit(document, "")) if document is not None else DASH
        for document in documents])
    # The DC budget of each place (engine/dc.py): metric key -> key of the place's ``dc`` object.
    for key, field in (("dc_gain", "gain"), ("gain_error_pct", "gain_error_pct"), ("offset_out_v", "offset_out_v"),
                       ("drift_out_v_per_c", "drift_out_v_per_c"), ("total_wc_v", "total_wc_v"),
                       ("total_rss_v", "total_rss_v")):
        rows.append([METRICS[key].label] + [
            _value_or_why(document.get("dc") if isinstance(document.get("dc"), dict) else None, field,
                          # the gain's unit is the place's own (Ω for a current drive)
                          str(document.get("unit") or METRICS[key].unit) if key == "dc_gain" else METRICS[key].unit)
            if isinstance(document, dict) else DASH for document in documents])
    return rows


def _chain(content: PacketContent) -> list[Block]:
    project = content.project
    blocks: list[Block] = [Spacer(12.0), Heading("The chain", 1), Heading("Block diagram", 2)]
    boxes = _diagram_boxes(content)

    def draw(painter: QPainter, rect: QRectF) -> None:
        draw_diagram(painter, rect, boxes)

    blocks.append(Figure(draw, diagram_height(len(boxes), 650.0),
                         "Stages in chain order from the source to the converter. Figures are isolated: gain at "
                         "the reference frequency and the −3 dB band (DC: no lower corner in the analysed band). "
                         "Dashed grey: bypassed, not in the chain."))
    blocks.append(Heading("Response of the whole chain", 2))
    if content.chain.response is not None:
        traces = _traces([("chain", content.chain)])
        limits = _limits(content, project.stages, ("chain",))
        label = _magnitude_label("Ω" if project.input.drive == "current" else "V/V")
        blocks.append(_plot_figure(lambda canvas: response_plot(traces, limits, magnitude_label=label, canvas=canvas),
                                   360.0, "Drive to the last output, every stage loaded by the next. Shaded: limits "
                                   f"of checks on the whole chain.{_level_words(limits)}"))
    else:
        blocks.append(_unavailable(f"Chain response plot: {content.chain.why}."))
    analysis = content.analysis
    chain = analysis.get("chain") if analysis else None
    if chain is None:
        why = (analysis or {}).get("chain_why") or content.analysis_why or NOT_IN_BUILD
        blocks.append(_unavailable(f"Chain figures: {why}."))
        return blocks
    blocks.append(Table([Column("figure"), Column("whole chain", "right")], _metrics_rows([chain])))
    blocks.extend(_noise(chain, project))
    blocks.extend(_dc_budget(chain, project))
    blocks.extend(_converter(chain, project))
    blocks.extend(_headroom(chain))
    blocks.extend(_spread(chain))
    return blocks


def _noise(chain: dict[str, Any], project: Project) -> list[Block]:
    blocks: list[Block] = [Heading("Noise budget", 2)]
    noise = chain.get("noise")
    if not isinstance(noise, dict):
        blocks.append(_unavailable(f"Noise: {_why(chain, 'noise') or NOT_IN_BUILD}."))
        return blocks
    band = noise.get("band_hz") or [None, None]
    in_unit = str(noise.get("in_unit") or ("A" if project.input.drive == "current" else "V"))
    rows = [
        ("Noise band", f"{_text(band[0], 'Hz')} to {_text(band[1], 'Hz')}"),
        ("Temperature", f"{noise['temperature_k']:.2f} K" if isinstance(noise.get("temperature_k"), int | float)
         else DASH),
        ("Output noise (RMS)", _value_or_why(noise, "out_rms_v", "V")),
        (f"Output density at {_text(noise.get('ref_hz'), 'Hz')}", _value_or_why(noise, "out_density_v_rthz_at_ref",
                                                                               "V/√Hz")),
        ("Input-referred noise (RMS)", _value_or_why(noise, "in_rms", in_unit)),
        ("Input-referred density at the same frequency", _value_or_why(noise, "in_density_at_ref", f"{in_unit}/√Hz")),
    ]
    blocks.append(_key_values(rows))
    sources = noise.get("top_sources") or []
    if sources:
        table_rows = []
        names = []
        values = []
        for source in sources:
            name = str(source.get("source") or source.get("ref") or "?")
            table_rows.append([name, str(source.get("kind", "")), _text(source.get("rms_v"), "V"),
                               _text(source.get("share_pct"), "%")])
            names.append(name)
            values.append(float(source.get("rms_v") or 0.0) * 1e6)
        blocks.append(Heading("Top contributors", 3))
        blocks.append(Table([Column("source"), Column("kind"), Column("output RMS", "right", wrap=False),
                             Column("share of output power", "right", wrap=False)], table_rows))
        blocks.append(_bars_figure(names, values, "output noise RMS over the band (µV)",
                                   "Largest contributors to the output noise over the noise band."))
    for note in noise.get("notes") or []:
        blocks.append(Paragraph(f"Note: {note}", 10.5, color=QColor(MUTED)))
    return blocks


DC_TABLE_ROWS = 15


def _bars_figure(names: list[str], values: list[float], axis_label: str, caption: str) -> Figure:
    """A horizontal bar figure of contributions, tall enough for one bar per name."""
    return _plot_figure(lambda canvas: bars_plot(names, values, axis_label, canvas=canvas),
                        max(130.0, 24.0 * len(names) + 70.0), caption)


def _dc_budget(chain: dict[str, Any], project: Project) -> list[Block]:
    """The DC accuracy budget at the converter input (engine/dc.py), largest contributors first."""
    from stagewise.engine.dc import budget_table  # noqa: PLC0415

    blocks: list[Block] = [Heading("DC accuracy budget", 2)]
    dc = chain.get("dc")
    if not isinstance(dc, dict):
        blocks.append(_unavailable(f"DC budget: {_why(chain, 'dc') or NOT_IN_BUILD}."))
        return blocks
    span = dc.get("temp_range_c")
    rows = [
        ("Temperature range", f"{span[0]:g} to {span[1]:g} °C (drift counted from 25 °C)" if span
         else "not given: 25 °C only"),
        ("Reference signal level at the converter input", _value_or_why(dc, "signal_out_v", "V")),
        ("DC gain", _value_or_why(dc, "gain", "Ω" if project.input.drive == "current" else "V/V")),
        ("DC gain error, worst case at 25 °C", _value_or_why(dc, "gain_error_pct", "%")),
        ("Output offset, worst case at 25 °C", _value_or_why(dc, "offset_out_v", "V")),
        ("Drift over the range (average slope)", _value_or_why(dc, "drift_out_v_per_c", "V/°C")),
    ]
    for label, total in (("worst case", "wc"), ("root-sum-square", "rss")):
        for place, suffix in (("at 25 °C", "_25c"), ("over the range", "")):
            key = f"total_{total}{suffix}"
            pieces = [_value_or_why(dc, f"{key}_v", "V")]
            if dc.get(f"{key}_lsb") is not None:
                pieces.append(f"{_text(dc[f'{key}_lsb'])} LSB")
            if dc.get(f"{key}_pct_fs") is not None:
                pieces.append(f"{_text(dc[f'{key}_pct_fs'], '%')} of full scale")
            rows.append((f"DC error, {label}, {place}", ", ".join(pieces)))
    blocks.append(_key_values(rows))
    table = budget_table(dc)
    if table.rows:
        shown = table.rows[:DC_TABLE_ROWS]
        blocks.append(Heading("Largest contributors at the converter input", 3))
        blocks.append(Table([Column("source"), Column("stage", wrap=False), Column("kind"),
                             Column(f"error ({table.unit})", "right", wrap=False),
                             Column("gain error (%)", "right", wrap=False), Column("drift", wrap=False)],
                            [[row.source, row.stage, row.kind, DASH if row.value is None else f"{row.value:.4g}",
                              DASH if row.gain_error_pct is None else f"{row.gain_error_pct:.4g}",
                              "yes" if row.over_temperature else "no"] for row in shown]))
        bars = [row for row in shown if row.value is not None]
        names = [f"{row.stage}: {row.source}" for row in bars]
        values = [abs(row.value or 0.0) for row in bars]
        if bars:
            blocks.append(_bars_figure(names, values, f"error at the converter input ({table.unit}, magnitude)",
                                       "Largest DC error contributions at the converter input; gain errors at "
                                       "the reference signal level, drifts at the end of the temperature range."))
        if len(table.rows) > DC_TABLE_ROWS:
            blocks.append(Paragraph(f"{len(table.rows) - DC_TABLE_ROWS} smaller contributions are in "
                                    "the analysis document (analyze --json).", 10.5, color=QColor(MUTED)))
    for note in dc.get("notes") or []:
        blocks.append(Paragraph(f"Note: {note}", 10.5, color=QColor(MUTED)))
    return blocks


def _converter(chain: dict[str, Any], project: Project) -> list[Block]:
    blocks: list[Block] = [Heading("Converter", 2)]
    figures = chain.get("converter")
    if not isinstance(figures, dict):
        blocks.append(_unavailable(f"Converter figures: {_why(chain, 'converter') or NOT_IN_BUILD}."))
        return blocks
    bits = figures.get("bits")
    rows = [
        ("Sampling rate", _value_or_why(figures, "fs_hz", "Hz")),
        ("Resolution", f"{bits} bit" if bits else _value_or_why(figures, "bits", "")),
        ("Full scale (peak to peak)", _value_or_why(figures, "full_scale_vpp", "V")),
        ("LSB", _value_or_why(figures, "lsb_v", "V")),
        ("Quantization noise (RMS)", _value_or_why(figures, "quantization_noise_v_rms", "V")),
        ("Ideal converter SNR, 6.02 N + 1.76 dB", _value_or_why(figures, "ideal_snr_db", "dB")),
        ("Pass-band edge used", _value_or_why(figures, "f_pass_hz", "Hz")
         + (f" ({figures['f_pass_source']})" if figures.get("f_pass_source") else "")),
        ("Folds into the pass band from", _value_or_why(figures, "alias_hz", "Hz")),
        ("Attenuation there (alias attenuation)", _value_or_why(figures, "alias_attenuation_db", "dB")
         + (f" ({reference_words(figures['ref'], 'dBΩ' if chain.get('unit') == 'Ω' else 'dB')})"
            if isinstance(figures.get("ref"), dict) and figures.get("alias_attenuation_db") is not None else "")),
        ("Chain noise at the converter (RMS)", _value_or_why(figures, "noise_rms_v", "V")),
        ("Chain noise in LSB (RMS)", _value_or_why(figures, "noise_rms_lsb", "")),
        ("SNR, chain and quantization noise against full-scale sine", _value_or_why(figures, "snr_db", "dB")),
        ("SNR, chain noise only", _value_or_why(figures, "snr_noise_only_db", "dB")),
        ("Largest peak at the converter input (declared input)", _value_or_why(figures, "converter_peak_v", "V")
         + (f" at {format_value(figures['converter_peak_hz'], 'Hz')}" if figures.get("converter_peak_hz") else "")),
        ("Converter headroom (full scale over that peak)", _value_or_why(figures, "converter_headroom_db", "dB")),
    ]
    blocks.append(_key_values(rows))
    for note in figures.get("notes") or []:
        blocks.append(Paragraph(f"Note: {note}", 10.5, color=QColor(MUTED)))
    return blocks


def _headroom(chain: dict[str, Any]) -> list[Block]:
    blocks: list[Block] = [Heading("Headroom and slew at the declared input", 2)]
    headroom = chain.get("headroom")
    if not isinstance(headroom, list):
        blocks.append(_unavailable(f"Headroom: {_why(chain, 'headroom') or NOT_IN_BUILD}."))
        return blocks
    if not headroom:
        blocks.append(Paragraph("No finite op-amp model in the chain: nothing to check.", 11.5))
        return blocks
    rows = []
    marks = []
    for item in headroom:
        margin = item.get("swing_margin_v")
        slew = item.get("slew_margin")
        rows.append([str(item.get("ref", "")), _value_or_why(item, "peak_v", "V"), _text(item.get("at_hz"), "Hz"),
                     _value_or_why(item, "swing_margin_v", "V"), _value_or_why(item, "slew_needed_v_per_s", "V/s"),
                     _value_or_why(item, "slew_margin", "")])
        short = (isinstance(margin, int | float) and margin < 0) or (isinstance(slew, int | float) and slew < 1)
        marks.append("bad" if short else "")
    blocks.append(Table([Column("op-amp"), Column("peak output", "right"), Column("at", "right", wrap=False),
                         Column("swing margin", "right"), Column("slew needed", "right"),
                         Column("slew margin (×)", "right")], rows, size_px=10.5, row_marks=marks))
    return blocks


def _spread(chain: dict[str, Any]) -> list[Block]:
    blocks: list[Block] = [Heading("Spread over tolerances and yield", 2)]
    spread = chain.get("spread")
    if not isinstance(spread, dict):
        blocks.append(_unavailable(f"Spread: {_why(chain, 'spread') or NOT_IN_BUILD}."))
        return blocks
    blocks.append(_key_values([
        ("Method", f"Monte Carlo, {_text(spread.get('samples'))} samples, {spread.get('distribution', DASH)} "
                   f"within each tolerance, seed {_text(spread.get('seed'))}"),
        ("Yield against the checks", _value_or_why(spread, "yield_pct", "%")),
    ]))
    metrics = spread.get("metrics")
    if isinstance(metrics, dict) and metrics:
        rows = []
        for key, values in metrics.items():
            if not isinstance(values, dict):
                continue
            unit = str(values.get("unit") or (METRICS[key].unit if key in METRICS else ""))
            unit = "°" if unit == "deg" else unit
            base, _, where = key.partition(":")
            label = (METRICS[base].label if base in METRICS else base.replace("_", " ")) + (f", {where}" if where else "")
            if values.get("why") and values.get("p50") is None:
                rows.append([label, f"{DASH} ({values['why']})", "", "", "", ""])
                continue
            rows.append([label] + [_text(values.get(name), unit) for name in ("nominal", "p1", "p50", "p99")]
                        + [f"{_text(values.get('min'), unit)} … {_text(values.get('max'), unit)}"])
        if rows:
            blocks.append(Table([Column("metric"), Column("nominal", "right"), Column("1 %", "right"),
                                 Column("median", "right"), Column("99 %", "right"), Column("min … max", "right")],
                                rows, size_px=10.5))
    worst = spread.get("worst_case")
    if isinstance(worst, dict) and worst:
        rows = []
        for key, values in worst.items():
            if not isinstance(values, dict):
                continue
            unit = METRICS[key].unit if key in METRICS else ""
            label = METRICS[key].label if key in METRICS else key.replace("_", " ")
            confirmed = "confirmed by evaluation" if values.get("confirmed") else str(values.get("why") or "not confirmed")
            rows.append([label, _text(values.get("low"), unit), _text(values.get("high"), unit), confirmed])
        if rows:
            blocks.append(Heading("Worst case (extreme vertices from sensitivity signs)", 3))
            blocks.append(Table([Column("metric"), Column("low", "right"), Column("high", "right"), Column("")],
                                rows, size_px=10.5))
    limits = spread.get("limits")
    samples = spread.get("samples")
    if isinstance(limits, list) and limits:
        blocks.append(Table([Column("check counted in the yield"), Column("samples meeting it", "right", wrap=False)],
                            [[str(item.get("label", "")),
                              f"{item.get('pass_count', DASH)} of {samples} ({_text(item.get('pass_pct'), '%')})"]
                             for item in limits], size_px=10.5))
    skipped = spread.get("not_evaluated")
    if isinstance(skipped, list) and skipped:
        blocks.append(Table([Column("check not counted in the yield", wrap=False), Column("why")],
                            [[str(item.get("label", "")), str(item.get("why", ""))] for item in skipped],
                            size_px=10.5))
    for note in spread.get("notes") or []:
        blocks.append(Paragraph(f"Note: {note}", 10.5, color=QColor(MUTED)))
    return blocks


# --- one section per stage ---------------------------------------------------------------------


def _part_value(part: Any, project: Project) -> tuple[str, str]:
    if part.type == "opamp":
        model = part.model or "ideal"
        if model != "ideal" and model in project.opamp_models:
            found = project.opamp_models[model]
            return model, f"A0 {found.a0_db.si:g} dB, GBW {format_value(found.gbw_hz.si, 'Hz', 3)}"
        return model, "ideal (nullor)" if model == "ideal" else "model missing"
    unit = PART_TYPES[part.type][2]
    if part.value is None:
        return DASH, ""
    shown = format_value(part.value.si, unit)
    written = str(part.value.raw)
    return shown, f"written {written}" if written.replace(" ", "") != shown.replace(" ", "") else ""


def _parts(stage: Stage, project: Project) -> list[Block]:
    blocks: list[Block] = [Heading("Parts", 3)]
    if stage.is_block:
        gain = _text(stage.gain.si if stage.gain else None)
        roots = []
        for label, items in (("zeros", stage.zeros_hz), ("poles", stage.poles_hz)):
            texts = []
            for root in items:
                if isinstance(root, tuple):
                    texts.append(f"pair f0 {format_value(root[0].si, 'Hz', 3)}, Q {root[1].si:.4g}")
                else:
                    texts.append(format_value(root.si, "Hz", 3))
            roots.append((label, ", ".join(texts) or "none"))
        zin = " ∥ ".join(text for text in (
            format_value(stage.zin_r_ohm.si, "Ω") if stage.zin_r_ohm else "",
            format_value(stage.zin_c_f.si, "F") if stage.zin_c_f else "") if text) or "open"
        blocks.append(_key_values([("Kind", "behavioural block"), ("Gain", gain), *roots, ("Input impedance", zin),
                                   ("Output resistance", _text(stage.zout_ohm.si if stage.zout_ohm else 0.0, "Ω"))]))
        return blocks
    rows = []
    for part in stage.parts:
        value, note = _part_value(part, project)
        tolerance = f"±{part.tol.si * 100:.3g} %" if part.tol is not None else DASH
        rows.append([part.ref, part.type, " ".join(part.nodes), value, tolerance,
                     note + (f"; controlled by {part.control}" if part.control else "")])
    blocks.append(Table([Column("ref", wrap=False), Column("type", wrap=False), Column("nodes"),
                         Column("value / model"), Column("tolerance", "right", wrap=False), Column("notes")], rows))
    ports = f"input port node {stage.ports.get('in')}, output port node {stage.ports.get('out')}, reference node 0"
    blocks.append(Paragraph(f"Ports: {ports}. Drive when isolated: ideal {stage.drive} source.", 10.5,
                            color=QColor(MUTED)))
    return blocks


_FORMULA_SHOWN_WHOLE = 420  # characters; longer transfer functions are shown coefficient by coefficient


def _parameter(expression: Any, value: Any, unit: str = "") -> str:
    """A standard-form parameter: its expression in the parts and its value (once when it is a number)."""
    if expression is None:
        return DASH
    shown = DASH if value is None else (_text(value, unit) if unit else f"{value:.5g}")
    try:
        float(str(expression))
    except ValueError:
        return f"{pretty(str(expression))}\n= {shown}"
    return shown


def _superscript(power: int) -> str:
    return "" if power == 1 else str(power).translate(str.maketrans("0123456789", "⁰¹²³⁴⁵⁶⁷⁸⁹"))


def _symbolic_blocks(stage: Stage, content: PacketContent) -> list[Block]:
    blocks: list[Block] = [Heading("Transfer function", 3)]
    found = content.symbolic.get(stage.id, {})
    if stage.is_block:
        blocks.append(Paragraph("A behavioural block: its transfer function is its gain, zeros and poles above.",
                                11.5))
        return blocks
    form = found.get("form")
    if not isinstance(form, dict):
        blocks.append(_unavailable(f"Symbolic form: {found.get('why', NOT_IN_BUILD)}."))
        return blocks
    unit = form.get("unit") or "V/V"
    finite = found.get("finite")
    name = "H_ideal(s)" if finite else "H(s)"
    numerator_text = polynomial(list(form.get("numerator") or []))
    denominator_text = polynomial(list(form.get("denominator") or []))
    if finite:
        blocks.append(_intro("With every op-amp ideal (a nullor), in the part symbols:"))
    if len(numerator_text) + len(denominator_text) <= _FORMULA_SHOWN_WHOLE:
        blocks.append(Paragraph(f"{name} = ({numerator_text}) / ({denominator_text})", 11.0))
    else:
        numerator = list(form.get("numerator") or [])
        denominator = list(form.get("denominator") or [])
        order = max(len(numerator), len(denominator))
        blocks.append(_intro(f"{name} = N(s) / D(s), with D monic; coefficients of s to each power, highest first:"))
        rows = []
        for index in range(order):
            power_n = len(numerator) - 1 - index
            power_d = len(denominator) - 1 - index
            rows.append([f"s{_superscript(max(power_n, power_d))}",
                         pretty(numerator[index - (order - len(numerator))]) if index >= order - len(numerator)
                         else "0",
                         pretty(denominator[index - (order - len(denominator))]) if index >= order - len(denominator)
                         else "0"])
        blocks.append(Table([Column("power", wrap=False), Column("N(s)"), Column("D(s)")], rows, size_px=9.5))
    if finite:
        blocks.append(_intro("Finite op-amp gain, as a factor on the ideal form:"))
        for line in finite_gain_lines(finite):
            blocks.append(Paragraph(line, 10.5))
    blocks.append(Paragraph(f"Unit of H: {unit}. Part symbols stand for the values in the parts table"
                            + ("; coefficients are numeric." if form.get("numeric") else "."), 10.5,
                            color=QColor(MUTED)))
    if form.get("why"):
        blocks.append(_unavailable(f"Note: {form['why']}."))
    sections = form.get("sections") or []
    if sections:
        rows = []
        for section in sections:
            rows.append([f"{section.get('order')}", str(section.get("kind", "")),
                         _parameter(section.get("gain"), section.get("gain_value")),
                         _parameter(section.get("f0_hz"), section.get("f0_hz_value"), "Hz"),
                         _parameter(section.get("q"), section.get("q_value"))])
        blocks.append(_intro("Standard-form sections (K, f0 = ω0/2π, Q) in the parts and their values:"))
        blocks.append(Table([Column("order", "right", wrap=False), Column("kind", wrap=False), Column("K"),
                             Column("f0"), Column("Q")], rows, size_px=9.5))
    return blocks


def _roots_rows(roots: Sequence[dict[str, Any]]) -> list[list[str]]:
    rows = []
    for root in roots:
        q = root.get("q")
        if q is None:
            q_text = "∞ (undamped)" if root.get("half_plane") == "axis" and root.get("im") else "real: no Q"
        else:
            q_text = f"{q:.4g}"
        if root.get("half_plane") == "right":
            q_text += " (right half-plane)"
        rows.append([f"{root.get('re', 0.0):.5g}", f"{root.get('im', 0.0):.5g}", _text(root.get("f_hz"), "Hz"),
                     q_text])
    return rows


def _poles_zeros(entry: dict[str, Any] | None, content: PacketContent) -> list[Block]:
    blocks: list[Block] = [Heading("Poles and zeros (isolated)", 3)]
    isolated = entry.get("isolated") if entry else None
    if not isinstance(isolated, dict) or not isinstance(isolated.get("poles"), list):
        why = _why(isolated, "poles") if isinstance(isolated, dict) else None
        blocks.append(_unavailable(f"Poles and zeros: {why or content.analysis_why or NOT_IN_BUILD}."))
        return blocks
    poles = isolated.get("poles") or []
    zeros = isolated.get("zeros") or []
    columns = [Column("re (rad/s)", "right"), Column("im (rad/s)", "right"), Column("f", "right"), Column("Q", "right")]
    blocks.append(_label(f"Poles ({len(poles)})"))
    blocks.append(Table(columns, _roots_rows(poles)) if poles else Paragraph("none", 11.5))
    blocks.append(_label(f"Zeros ({len(zeros)})"))
    blocks.append(Table(columns, _roots_rows(zeros)) if zeros else Paragraph("none (no finite zeros)", 11.5))
    notes = dict.fromkeys(str(root["note"]) for root in [*poles, *zeros] if isinstance(root, dict) and root.get("note"))
    for note in notes:
        blocks.append(Paragraph(note[0].upper() + note[1:] + ".", 10.5))
    if poles or zeros:
        pole_values = [complex(p.get("re", 0.0), p.get("im", 0.0)) for p in poles]
        zero_values = [complex(z.get("re", 0.0), z.get("im", 0.0)) for z in zeros]
        f_top = content.project.settings.f_max_hz.si
        caption = pole_zero_caption(pole_values, zero_values, f_top)
        blocks.append(_plot_figure(lambda canvas: pole_zero_plot(pole_values, zero_values, f_top, canvas=canvas), 250.0,
                                   f"Poles × (blue), zeros ○ (vermillion). {caption}"))
    return blocks


def _limits(content: PacketContent, stages: Sequence[Stage], wheres: tuple[str, ...]) -> list[LimitShape]:
    """The gates and levels the program draws for these checks (:mod:`stagewise.present.limits`).

    A peaking limit is a level above the place's pass-band reference, read from the same
    analysis document as the printed figures (peak gain − peaking). Waived checks are not drawn.
    """
    shapes: list[LimitShape] = []
    for stage in stages:
        entry = content.stage_analysis(stage.id) or {}
        for check in stage.checks:
            if check.where not in wheres or check.waiver is not None:
                continue
            shapes.extend(limit_shapes(check, content.project))
            metrics = (content.analysis or {}).get("chain") if check.where == "chain" else entry.get(check.where)
            level = peaking_level(check, peaking_reference_db(metrics if isinstance(metrics, dict) else None))
            if level is not None:
                shapes.append(level)
    return shapes


def _level_words(limits: Sequence[LimitShape]) -> str:
    """What a dashed level on a response plot means, when there is one."""
    if not any(y_low == y_high for _, _, _, (y_low, y_high) in limits):
        return ""
    return (" Dashed line: the highest level a peaking check allows (the pass-band reference plus the allowed "
            "peaking); the trace must stay below it.")


def _magnitude_label(unit: str) -> str:
    return "magnitude (dB re 1 Ω)" if unit == "Ω" else "magnitude (dB)"


def _response_blocks(stage: Stage, content: PacketContent) -> list[Block]:
    blocks: list[Block] = [Heading("Response: isolated and in chain", 3)]
    curves = content.stages[stage.id]
    unit = "Ω" if stage.drive == "current" else "V/V"
    places = [("isolated", curves.isolated), ("in chain", curves.in_chain)]
    # Seen from the chain input: drawn on the same axes where it is in the stage's own unit.
    drawn_from_input = curves.from_input_unit == unit and curves.from_input.response is not None
    if drawn_from_input:
        places.append(("from chain input", curves.from_input))
    available = [(label, curve) for label, curve in places if curve.response is not None]
    missing = [f"{label}: {curve.why}" for label, curve in places if curve.response is None]
    if available:
        traces = _traces(available)
        limits = _limits(content, [stage], ("isolated", "in_chain", "from_input")
                         if drawn_from_input else ("isolated", "in_chain"))
        label = _magnitude_label(unit)
        from_input_words = (" From chain input: the chain's drive to this stage's output, everything before and "
                            "after it in place." if drawn_from_input else "")
        blocks.append(_plot_figure(lambda canvas: response_plot(traces, limits, magnitude_label=label, legend=False,
                                                                 canvas=canvas), 300.0,
                                   f"Traces: {legend_text([trace.label for trace in traces])}. Isolated: ideal "
                                   "drive, unloaded. In chain: the stage where it sits (V_out/V_in, or V_out/I_in "
                                   f"for a current-driven stage).{from_input_words} Shaded: limits of the stage's "
                                   f"checks on gain or phase at a frequency.{_level_words(limits)}"))
    if not drawn_from_input and curves.from_input.response is not None:
        blocks.append(Paragraph(f"From the chain input the response is in {curves.from_input_unit} (the chain's "
                                f"drive), not in this plot's {unit}: its figures are in the table below.", 10.5))
    for line in missing:
        blocks.append(_unavailable(line[0].upper() + line[1:] + "."))
    blocks.extend(_step_blocks(stage, content))
    return blocks


def _step_blocks(stage: Stage, content: PacketContent) -> list[Block]:
    curves = content.stages[stage.id]
    pairs = (("isolated", curves.step_isolated), ("in chain", curves.step_in_chain))
    traces = [(label, step.t_s, step.y) for label, step in pairs if step.t_s is not None and step.y is not None]
    missing = [f"Step response {label}: {step.why}." for label, step in pairs if step.y is None]
    blocks: list[Block] = [Heading("Step response: isolated and in chain", 3)]
    if traces:
        unit = "V per A" if stage.drive == "current" else "V"
        blocks.append(_plot_figure(lambda canvas: step_plot(traces, f"output ({unit}) for a unit step", canvas=canvas), 210.0,
                                   f"Traces: {legend_text([label for label, _, _ in traces])}. Response of the "
                                   "minimal pole/zero model to a unit step at the input."))
    blocks.extend(_unavailable(line) for line in missing)
    return blocks


def _loop_blocks(stage: Stage, content: PacketContent) -> list[Block]:
    """The loop gain of each finite op-amp, alone and in chain, with its margins in words."""
    loops = content.stages[stage.id].loops
    if not loops:
        return []
    traces = [trace_from_complex(label, result.f_hz, result.loop_gain) for label, result in loops]
    crossovers = [result.crossover_hz for _, result in loops]
    words = "; ".join(loop_summary(label, result.crossover_hz, result.phase_margin_deg, result.gain_margin_db,
                                   result.phase_margin_why) for label, result in loops)
    return [Heading("Loop gain", 3),
            _plot_figure(lambda canvas: loop_gain_plot(traces, crossovers, canvas=canvas), 260.0,
                         f"Traces: {legend_text([trace.label for trace in traces])}. Loop gain T = A·β of each "
                         "finite op-amp with the drive zeroed, alone and where it sits in the chain. Dashed: 0 dB; "
                         "dotted: the crossover (|T| = 1), where the phase margin is 180° + ∠T. "
                         f"{words}.")]


def _stage_metrics(entry: dict[str, Any] | None, content: PacketContent) -> list[Block]:
    blocks: list[Block] = [Heading("Figures", 3)]
    if entry is None:
        blocks.append(_unavailable(f"Figures: {content.analysis_why or NOT_IN_BUILD}."))
        return blocks
    isolated = entry.get("isolated") if isinstance(entry.get("isolated"), dict) else None
    in_chain = entry.get("in_chain") if isinstance(entry.get("in_chain"), dict) else None
    from_input = entry.get("from_input") if isinstance(entry.get("from_input"), dict) else None
    for label, key, document in (("Isolated", "isolated", isolated), ("In chain", "in_chain", in_chain),
                                 ("From the chain input", "from_input", from_input)):
        if document is None:
            blocks.append(_unavailable(f"{label}: {entry.get(f'{key}_why') or 'no figures'}."))
    documents = [isolated, in_chain, from_input]
    rows = _metrics_rows(documents) if any(document is not None for document in documents) else []
    signed, at_hz = entry.get("loading_error_db"), entry.get("loading_error_f_hz")
    loading = (f"{signed:+.3g} dB at {format_value(at_hz, 'Hz', 3)}"
               if isinstance(signed, int | float) and isinstance(at_hz, int | float)
               else _value_or_why(entry, "loading_error_db", "dB"))
    rows.append(["Loading error (in chain − isolated, largest)", DASH, loading, DASH])
    rows.append(["Input impedance at the reference frequency", DASH, _value_or_why(entry, "zin_ohm_at_ref", "Ω"),
                 DASH])
    rows.append(["Output impedance at the reference frequency", DASH,
                 _value_or_why(entry, "zout_ohm_at_ref", "Ω"), DASH])
    blocks.append(Table([Column("figure"), Column("isolated", "right"), Column("in chain", "right"),
                         Column("from chain input", "right")], rows))
    blocks.append(Paragraph("From the chain input: the chain's drive to this stage's output, everything before and "
                            "after it in place (a transimpedance in Ω where the chain is current-driven).", 10.5))
    # Every op-amp's loop isolated and where it sits, side by side (the in-chain loop includes
    # what the neighbours do to its feedback network, e.g. a sensor's capacitance at a summing node).
    alone = {str(loop.get("ref", "")): loop for loop in (isolated or {}).get("loops") or [] if isinstance(loop, dict)}
    placed = {str(loop.get("ref", "")): loop for loop in (in_chain or {}).get("loops") or [] if isinstance(loop, dict)}
    refs = list(alone) + [ref for ref in placed if ref not in alone]
    if refs:
        loop_rows = []
        for ref in refs:
            row = [ref]
            for key, unit in (("crossover_hz", "Hz"), ("phase_margin_deg", "°"), ("gain_margin_db", "dB")):
                for source in (alone, placed):
                    loop = source.get(ref)
                    row.append(_text(loop.get(key), unit) if loop is not None else DASH)
            loop_rows.append(row)
        blocks.append(Table([Column("op-amp loop"), Column("crossover isolated", "right"),
                             Column("crossover in chain", "right"), Column("phase margin isolated", "right"),
                             Column("phase margin in chain", "right"), Column("gain margin isolated", "right"),
                             Column("gain margin in chain", "right")], loop_rows, size_px=10.5))
    return blocks


def _checks(stage: Stage, results: list[CheckResult]) -> list[Block]:
    blocks: list[Block] = [Heading("Checks", 3)]
    mine = [result for result in results if result.stage_id == stage.id]
    if not mine:
        blocks.append(Paragraph("No checks on this stage.", 11.5))
        return blocks
    rows = []
    marks = []
    for result in mine:
        check = next(item for item in stage.checks if item.id == result.check_id)
        where = WHERE_WORDS.get(result.where or "", "") if result.metric else "manual"
        if result.metric:
            what = METRICS[result.metric].label if result.metric in METRICS else result.metric
            if result.at_hz is not None:
                what += f" at {format_value(result.at_hz, 'Hz', 3)}"
            what += f", {where}"
            if result.reference:
                what += f" ({result.reference})"
        else:
            what = "manual question"
        reason = result.why or ""
        if check.waiver is not None:
            # The check's own reason already says who waived it and why (review/checks.py); the
            # packet adds only the date, so the justification is printed once.
            if reason.startswith("waived by"):
                reason = f"{reason} (waived {check.waiver.time[:10]})"
            else:
                reason = (f"waived by {check.waiver.by} ({check.waiver.time[:10]}): {check.waiver.justification}"
                          + (f"; {reason}" if reason else ""))
        rows.append([f"{result.check_id}\n{result.text}" if result.text else result.check_id, what,
                     result.limits or DASH, result.value_text(), str(result.state), reason])
        marks.append("bad" if result.state in (CheckState.NOT_MET, CheckState.NO_VALUE, CheckState.OPEN)
                     else "muted" if result.state == CheckState.WAIVED else "")
    blocks.append(Table([Column("check"), Column("metric"), Column("limits", wrap=False),
                         Column("value", "right", wrap=False), Column("status", wrap=False), Column("reason")],
                        rows, size_px=10.5, row_marks=marks))
    return blocks


def _signoffs(stage: Stage, state: StageSignoffs) -> list[Block]:
    blocks: list[Block] = [Heading("Sign-offs", 3)]
    shown = str(state.state).upper() if state.state == SignoffState.OUT_OF_DATE else str(state.state)
    blocks.append(Paragraph(f"Stage state: {shown}. "
                            f"Current fingerprint {state.fingerprint[:16]}…", 11.5))
    if not state.signoffs:
        blocks.append(Paragraph("Nobody has signed this stage.", 11.5))
        return blocks
    rows = []
    marks = []
    for view in state.signoffs:
        signoff = view.signoff
        status = view.verdict_word
        if view.out_of_date:
            status = f"{str(SignoffState.OUT_OF_DATE).upper()} ({status}, given to an earlier design)"
        if view.replaced:
            status += f"; {REPLACED_WORD}"
        rows.append([signoff.name, signoff.role, signoff.time, status, signoff.fingerprint[:12] + "…", signoff.note])
        marks.append("bad" if view.out_of_date and not view.replaced else "muted" if view.replaced else "")
    blocks.append(Table([Column("reviewer"), Column("role"), Column("time (UTC)", wrap=False), Column("verdict"),
                         Column("fingerprint", wrap=False, mono=True), Column("note")], rows, size_px=10.5,
                        row_marks=marks))
    return blocks


def _comments(stage: Stage) -> list[Block]:
    blocks: list[Block] = [Heading("Comments", 3)]
    if not stage.comments:
        blocks.append(Paragraph("No comments.", 11.5))
        return blocks
    rows = [[comment.author, comment.time, comment.check or DASH, "resolved" if comment.resolved else "open",
             comment.text] for comment in stage.comments]
    blocks.append(Table([Column("author"), Column("time (UTC)", wrap=False), Column("on check", wrap=False),
                         Column("state", wrap=False), Column("comment")], rows, size_px=10.5))
    return blocks


def _stage(stage: Stage, number: int, content: PacketContent, results: list[CheckResult],
           state: StageSignoffs) -> list[Block]:
    entry = content.stage_analysis(stage.id)
    title = f"Stage {number}: {stage.name}"
    blocks: list[Block] = [PageBreak(), Heading(title, 1)]
    facts = f"id {stage.id} · {'behavioural block' if stage.is_block else 'circuit'}"
    if stage.bypass:
        facts += " · BYPASSED: left out of the chain; its checks still stand"
    blocks.append(Paragraph(facts, 11.0, color=QColor(MUTED)))
    if stage.notes:
        blocks.append(Paragraph(stage.notes, 11.5))
    blocks.extend(_parts(stage, content.project))
    blocks.extend(_symbolic_blocks(stage, content))
    blocks.extend(_stage_metrics(entry, content))
    blocks.extend(_response_blocks(stage, content))
    blocks.extend(_loop_blocks(stage, content))
    blocks.extend(_poles_zeros(entry, content))
    blocks.extend(_checks(stage, results))
    blocks.extend(_signoffs(stage, state))
    blocks.extend(_comments(stage))
    return blocks


# --- audit trail -------------------------------------------------------------------------------


def _is_hash(value: object) -> bool:
    return isinstance(value, str) and len(value) == 64 and all(c in "0123456789abcdef" for c in value)


def _readable(key: str, value: Any) -> str:
    """An audit detail value in words: changes as sentences, records by who and what, hashes cut."""
    if key == "verdict" and isinstance(value, str):
        return VERDICT_WORDS.get(current_verdict(value), value)  # older events hold older words
    if _is_hash(value):
        return str(value)[:16] + "…"
    if isinstance(value, str):
        return value
    if isinstance(value, bool) or value is None:
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        return f"{value:g}"
    if isinstance(value, dict):
        if "subject" in value and "kind" in value:  # one change of a part-change event
            field = f" {FIELD_WORDS.get(str(value['field']), value['field'])}" if value.get("field") else ""
            # A change outside any stage (an op-amp model, a setting) has stage null: no prefix.
            words = f"{value.get('stage') or ''}: {value['subject']}{field} {value['kind']}".strip(": ")
            if value.get("old") is not None and value.get("new") is not None:
                words += f" from {value['old']} to {value['new']}"
            elif value.get("new") is not None:
                words += f": {value['new']}"
            return words
        if "name" in value and "verdict" in value:  # a sign-off
            verdict = VERDICT_WORDS.get(current_verdict(str(value["verdict"])), str(value["verdict"]))
            return f"{value['name']} ({verdict}, {value.get('stage', '')}, {str(value.get('time', ''))[:10]})"
        if all(_is_hash(item) for item in value.values()):  # fingerprints by stage
            return ", ".join(f"{name} {str(item)[:8]}…" for name, item in value.items())
        return ", ".join(f"{name.replace('_', ' ')} {_readable(name, item)}" for name, item in value.items()
                         if item not in ("", None, [], {}))
    if isinstance(value, list):
        items = [_readable(key, item) for item in value]
        return "; ".join(items) if items else "none"
    return str(value)


def _detail_text(detail: dict[str, Any]) -> str:
    """An audit event's detail as readable words (``key: value`` parts, never raw JSON)."""
    parts = []
    for key, value in detail.items():
        if value in ("", None, [], {}):
            continue  # an empty note says nothing
        parts.append(f"{key.replace('_', ' ')}: {_readable(key, value)}")
    return "; ".join(parts)


def _audit(content: PacketContent) -> list[Block]:
    events = content.project.audit
    blocks: list[Block] = [PageBreak(), Heading("Audit trail", 1)]
    verdict = verify_trail(events)
    blocks.append(Paragraph(verdict.sentence()[0].upper() + verdict.sentence()[1:] + ".", 12.0, bold=True))
    blocks.append(Paragraph(AUDIT_MEANING, 10.5, italic=True, color=QColor(MUTED)))
    if not events:
        blocks.append(Paragraph("No events recorded yet.", 11.5))
        return blocks
    rows = [[str(event.seq), event.time, event.who, EVENT_LABELS.get(event.what, event.what),
             _detail_text(event.detail), event.hash[:12] + "…"] for event in events]
    blocks.append(Table([Column("seq", "right", wrap=False), Column("time (UTC)", wrap=False), Column("who"),
                         Column("event"), Column("detail"), Column("hash", wrap=False, mono=True)], rows,
                        size_px=10.0))
    blocks.append(Paragraph("Printing this packet is recorded as the next event when the project is saved.", 10.5,
                            italic=True, color=QColor(MUTED)))
    return blocks


def build_blocks(content: PacketContent, results: list[CheckResult], states: dict[str, StageSignoffs],
                 printed_utc: str | None = None) -> list[Block]:
    """Every block of the packet, in order."""
    printed = printed_utc or datetime.now(UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")
    blocks = _cover(content, results, states, printed)
    blocks += _cautions(content)
    blocks += _chain(content)
    for number, stage in enumerate(content.project.stages, start=1):
        blocks += _stage(stage, number, content, results, states[stage.id])
    blocks += measurement_blocks(content, results)
    blocks += _audit(content)
    blocks.append(Spacer(1.0))
    return blocks
