"""Which traces the plots overlay: stages alone, in chain or from the chain input, the whole chain, the baseline.

A small Qt object shared by the chain tree (which ticks traces on and off) and the plots (which
draw them). Traces are listed in a stable order (chain, baseline, then each stage in chain
order, alone before in chain) and styled by their position in the list, so the visible traces
always differ in colour and, up to four of them, in line style as well.
"""

from __future__ import annotations

from dataclasses import dataclass

from PySide6.QtCore import QObject, Signal

from stagewise.model.project import Project
from stagewise.ui.palette import TraceStyle, trace_style

__all__ = ["CHAIN", "BASELINE", "FROM_INPUT", "IN_CHAIN", "ISOLATED", "OverlaySelection", "TraceSpec"]

CHAIN = "chain"
BASELINE = "baseline"
ISOLATED = "isolated"
IN_CHAIN = "in_chain"
FROM_INPUT = "from_input"  # the chain's drive to the stage's output


@dataclass(frozen=True, slots=True)
class TraceSpec:
    """One trace to draw: ``stage_id`` is empty for the chain and the baseline."""

    key: str
    label: str
    view: str  # CHAIN, BASELINE, ISOLATED, IN_CHAIN or FROM_INPUT
    stage_id: str
    style: TraceStyle


class OverlaySelection(QObject):
    """The set of ticked traces. ``changed`` fires when it really changes."""

    changed = Signal()

    def __init__(self, parent: QObject | None = None) -> None:
        super().__init__(parent)
        self._chain = True
        self._baseline = True
        self._stages: set[tuple[str, str]] = set()
        self._follow_selection = True
        self._hidden_measurements: set[str] = set()  # measurements are shown unless unticked

    def chain_shown(self) -> bool:
        return self._chain

    def baseline_shown(self) -> bool:
        return self._baseline

    def measurement_shown(self, measurement_id: str) -> bool:
        """Whether a bench measurement is drawn (beside the predicted trace of its place, when shown)."""
        return measurement_id not in self._hidden_measurements

    def set_measurement(self, measurement_id: str, shown: bool) -> None:
        if shown != self.measurement_shown(measurement_id):
            if shown:
                self._hidden_measurements.discard(measurement_id)
            else:
                self._hidden_measurements.add(measurement_id)
            self.changed.emit()

    def stage_shown(self, stage_id: str, view: str) -> bool:
        return (stage_id, view) in self._stages

    def set_chain(self, shown: bool) -> None:
        if shown != self._chain:
            self._chain = shown
            self.changed.emit()

    def set_baseline(self, shown: bool) -> None:
        if shown != self._baseline:
            self._baseline = shown
            self.changed.emit()

    def set_stage(self, stage_id: str, view: str, shown: bool) -> None:
        key = (stage_id, view)
        if shown and key not in self._stages:
            self._stages.add(key)
            self.changed.emit()
        elif not shown and key in self._stages:
            self._stages.discard(key)
            self.changed.emit()

    def show_only_stage(self, stage_id: str) -> None:
        """Show one stage alone and in chain (the default when a stage is selected)."""
        wanted = {(stage_id, ISOLATED), (stage_id, IN_CHAIN)} if stage_id else set()
        if wanted != self._stages:
            self._stages = wanted
            self.changed.emit()

    def traces(self, project: Project, has_baseline: bool) -> list[TraceSpec]:
        """The ticked traces in their stable order, each with its style."""
        wanted: list[tuple[str, str, str, str]] = []
        if self._chain:
            wanted.append(("chain", "Whole chain", CHAIN, ""))
        if self._baseline and has_baseline:
            wanted.append(("baseline", "Baseline chain", BASELINE, ""))
        for stage in project.stages:
            if (stage.id, ISOLATED) in self._stages:
                wanted.append((f"{stage.id}:{ISOLATED}", f"{stage.name} — alone", ISOLATED, stage.id))
            if (stage.id, IN_CHAIN) in self._stages and not stage.bypass:
                wanted.append((f"{stage.id}:{IN_CHAIN}", f"{stage.name} — in chain", IN_CHAIN, stage.id))
            if (stage.id, FROM_INPUT) in self._stages and not stage.bypass:
                wanted.append((f"{stage.id}:{FROM_INPUT}", f"{stage.name} — from the chain input", FROM_INPUT,
                               stage.id))
        return [TraceSpec(key, label, view, stage_id, trace_style(position))
                for position, (key, label, view, stage_id) in enumerate(wanted)]
