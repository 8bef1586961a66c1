"""Dialogs that author a review: the project, the converter, a block stage, a stage's checks and
the op-amp library.

Each dialog gathers text and hands the result to an ``apply`` callable (the main window passes
one that calls an undoable edit of :class:`stagewise.ui.document.Document`). When ``apply``
refuses with :class:`EditRefused`, the sentence is shown in the dialog, which stays open with
the text as typed; nothing is changed. Values are typed in the project file's engineering
notation (``4k7``, ``10n``, ``1M`` = mega, ``1m`` = milli).
"""

from __future__ import annotations

import copy
from collections.abc import Callable
from typing import Any

from PySide6.QtCore import Qt
from PySide6.QtWidgets import (
    QAbstractItemView,
    QComboBox,
    QDialog,
    QDialogButtonBox,
    QFormLayout,
    QGroupBox,
    QHBoxLayout,
    QHeaderView,
    QLabel,
    QLineEdit,
    QListWidget,
    QListWidgetItem,
    QPushButton,
    QSpinBox,
    QTableWidget,
    QTableWidgetItem,
    QVBoxLayout,
    QWidget,
)

from stagewise.model.project import Check, Converter, InputDrive, OpampModel, Project, Stage
from stagewise.model.values import Quantity, ValueSyntaxError, format_value
from stagewise.review.metrics import METRICS, WHERE_VALUES
from stagewise.review.words import WHERE_WORDS
from stagewise.ui.dialogs import FormDialog
from stagewise.ui.document import EditRefused

__all__ = [
    "BlockStageDialog",
    "CheckEditorDialog",
    "ConverterDialog",
    "OpampLibraryDialog",
    "ProjectDialog",
    "format_roots",
    "opamp_key_figures",
    "parse_roots",
]

Apply = Callable[[Any], None]
NOT_SET = "not set"


def _quantity(text: str, label: str, *, optional: bool = False, positive: bool = True) -> Quantity | None:
    """``text`` as a value; ``None`` for empty text when ``optional``; EditRefused with one sentence."""
    text = text.strip()
    if not text:
        if optional:
            return None
        raise EditRefused(f"{label} is needed")
    try:
        value = Quantity.of(text)
    except ValueSyntaxError as error:
        raise EditRefused(f"{label}: {error}") from error
    if positive and not value.si > 0:
        raise EditRefused(f'{label}: "{text}" must be greater than zero')
    return value


def _raw(value: Quantity | None) -> str:
    return "" if value is None else str(value.raw)


def parse_roots(text: str, label: str) -> list[Quantity | tuple[Quantity, Quantity]]:
    """Block-stage zeros or poles typed as ``1.2M, 20k Q0.707``: a real root at each frequency, a
    complex pair where ``Q`` follows (``Q=0.707`` also reads)."""
    roots: list[Quantity | tuple[Quantity, Quantity]] = []
    for number, entry in enumerate((piece.strip() for piece in text.replace(";", ",").split(",")), start=1):
        if not entry:
            continue
        frequency_text, separator, quality_text = entry.replace("q", "Q").partition("Q")
        where = f"{label} {number}"
        frequency = _quantity(frequency_text, f"{where} frequency")
        assert frequency is not None
        if separator:
            quality = _quantity(quality_text.lstrip("= "), f"{where} Q")
            assert quality is not None
            roots.append((frequency, quality))
        else:
            roots.append(frequency)
    return roots


def format_roots(roots: list[Quantity | tuple[Quantity, Quantity]]) -> str:
    """The text :func:`parse_roots` reads back."""
    return ", ".join(f"{root[0].raw} Q{root[1].raw}" if isinstance(root, tuple) else str(root.raw) for root in roots)


class _ApplyDialog(FormDialog):
    """OK hands :meth:`result_value` to ``apply``; a refusal is shown and the dialog stays open."""

    def __init__(self, title: str, intro: str, apply: Apply, parent: QWidget | None = None) -> None:
        super().__init__(title, intro, parent)
        self._apply = apply
        self.body = QVBoxLayout()
        self.problem = QLabel("")
        self.problem.setObjectName("dialogProblem")
        self.problem.setWordWrap(True)
        self.problem.setStyleSheet("color: #a4262c;")
        self.problem.setTextInteractionFlags(Qt.TextInteractionFlag.TextSelectableByMouse)
        self.problem.hide()
        layout = self.layout()
        assert isinstance(layout, QVBoxLayout)
        layout.insertLayout(layout.indexOf(self.buttons), self.body, 1)
        layout.insertWidget(layout.indexOf(self.buttons), self.problem)
        self.setMinimumWidth(460)

    @property
    def ok_button(self) -> QPushButton:
        return self.buttons.button(QDialogButtonBox.StandardButton.Ok)

    def result_value(self) -> Any:  # pragma: no cover - every dialog overrides it
        raise NotImplementedError

    def accept(self) -> None:
        try:
            self._apply(self.result_value())
        except EditRefused as error:
            self.problem.setText(f"Not changed: {str(error).rstrip('.')}.")
            self.problem.show()
            return
        self.problem.hide()
        QDialog.accept(self)


class ProjectDialog(_ApplyDialog):
    """Title, revision, input drive and amplitude, frequency range, reference frequency, noise
    band, temperature and random seed: one undoable edit."""

    def __init__(self, project: Project, apply: Apply, parent: QWidget | None = None) -> None:
        super().__init__("Project settings", "Values in engineering notation (10, 1k, 20k, 1M = mega, 10m = milli). "
                         "Empty optional fields mean not set. OK is one edit; Undo takes it back.", apply, parent)
        self._project = project
        settings = project.settings
        form = QFormLayout()
        self.title = QLineEdit(project.title)
        self.title.setCursorPosition(0)
        self.revision = QLineEdit(project.revision)
        self.drive = QComboBox()
        self.drive.addItem("Voltage source", "voltage")
        self.drive.addItem("Current source", "current")
        self.drive.setCurrentIndex(max(self.drive.findData(project.input.drive), 0))
        self.amplitude = QLineEdit(_raw(project.input.amplitude))
        self.amplitude.setPlaceholderText("peak amplitude, V or A (optional)")
        self.f_min = QLineEdit(_raw(settings.f_min_hz))
        self.f_max = QLineEdit(_raw(settings.f_max_hz))
        self.ref = QLineEdit(_raw(settings.ref_hz))
        self.ref.setPlaceholderText("optional")
        band = settings.noise_band_hz
        self.band_low = QLineEdit(_raw(band[0]) if band else "")
        self.band_high = QLineEdit(_raw(band[1]) if band else "")
        for field in (self.band_low, self.band_high):
            field.setPlaceholderText("optional")
        self.temperature = QLineEdit(_raw(settings.temperature_c))
        self.seed = QSpinBox()
        self.seed.setRange(0, 2**31 - 1)
        self.seed.setValue(settings.seed)
        band_row = QHBoxLayout()
        band_row.addWidget(self.band_low)
        band_row.addWidget(QLabel("to"))
        band_row.addWidget(self.band_high)
        band_row.addWidget(QLabel("Hz"))
        range_row = QHBoxLayout()
        range_row.addWidget(self.f_min)
        range_row.addWidget(QLabel("to"))
        range_row.addWidget(self.f_max)
        range_row.addWidget(QLabel("Hz"))
        form.addRow("Title", self.title)
        form.addRow("Revision", self.revision)
        form.addRow("Input drive", self.drive)
        form.addRow("Amplitude (peak)", self.amplitude)
        form.addRow("Frequency range", range_row)
        form.addRow("Reference frequency (Hz)", self.ref)
        form.addRow("Noise band", band_row)
        form.addRow("Temperature (°C)", self.temperature)
        form.addRow("Random seed (spread)", self.seed)
        self.body.addLayout(form)

    def result_value(self) -> dict[str, object]:
        if not self.title.text().strip():
            raise EditRefused("the project needs a title")
        settings = copy.deepcopy(self._project.settings)
        f_min = _quantity(self.f_min.text(), "the lowest frequency")
        f_max = _quantity(self.f_max.text(), "the highest frequency")
        assert f_min is not None and f_max is not None
        settings.f_min_hz, settings.f_max_hz = f_min, f_max
        settings.ref_hz = _quantity(self.ref.text(), "the reference frequency", optional=True)
        low = _quantity(self.band_low.text(), "the noise band's lower edge", optional=True)
        high = _quantity(self.band_high.text(), "the noise band's upper edge", optional=True)
        if (low is None) != (high is None):
            raise EditRefused("give both edges of the noise band, or neither")
        settings.noise_band_hz = (low, high) if low is not None and high is not None else None
        temperature = _quantity(self.temperature.text(), "the temperature", positive=False)
        assert temperature is not None
        settings.temperature_c = temperature
        settings.seed = self.seed.value()
        drive = InputDrive(drive=str(self.drive.currentData()),
                           amplitude=_quantity(self.amplitude.text(), "the amplitude", optional=True))
        return {"title": self.title.text().strip(), "revision": self.revision.text().strip(),
                "settings": settings, "input": drive}


class ConverterDialog(_ApplyDialog):
    """The converter at the end of the chain: sample rate, resolution and full scale."""

    def __init__(self, converter: Converter, apply: Apply, parent: QWidget | None = None) -> None:
        super().__init__("Converter", "The converter the chain drives. Leave a field empty (or bits at "
                         f"\"{NOT_SET}\") when it is not known yet; the figures that need it then say so.",
                         apply, parent)
        form = QFormLayout()
        self.fs = QLineEdit(_raw(converter.fs_hz))
        self.fs.setPlaceholderText("e.g. 96k")
        self.bits = QSpinBox()
        self.bits.setRange(0, 32)
        self.bits.setSpecialValueText(NOT_SET)
        self.bits.setValue(converter.bits or 0)
        self.full_scale = QLineEdit(_raw(converter.full_scale_vpp))
        self.full_scale.setPlaceholderText("peak-to-peak, e.g. 5")
        form.addRow("Sample rate (Hz)", self.fs)
        form.addRow("Resolution (bits)", self.bits)
        form.addRow("Full scale (V peak-to-peak)", self.full_scale)
        self.body.addLayout(form)

    def result_value(self) -> dict[str, object]:
        converter = Converter(fs_hz=_quantity(self.fs.text(), "the sample rate", optional=True),
                              bits=self.bits.value() or None,
                              full_scale_vpp=_quantity(self.full_scale.text(), "the full scale", optional=True))
        return {"converter": converter}


class BlockStageDialog(_ApplyDialog):
    """A behavioural block: name, gain, poles and zeros, input R ∥ C and output resistance."""

    def __init__(self, stage: Stage, apply: Apply, parent: QWidget | None = None) -> None:
        super().__init__(f"Block stage {stage.name}",
                         "Poles and zeros are frequencies in hertz separated by commas: a number is a real "
                         "root at s = −2πf, a number followed by Q a complex pair (for instance "
                         "\"1.2M, 20k Q0.707\"). The block needs at least as many poles as zeros.", apply, parent)
        form = QFormLayout()
        self.name = QLineEdit(stage.name)
        self.gain = QLineEdit(_raw(stage.gain) or "1")
        self.poles = QLineEdit(format_roots(stage.poles_hz))
        self.zeros = QLineEdit(format_roots(stage.zeros_hz))
        self.zin_r = QLineEdit(_raw(stage.zin_r_ohm))
        self.zin_c = QLineEdit(_raw(stage.zin_c_f))
        self.zout = QLineEdit(_raw(stage.zout_ohm))
        for field, hint in ((self.zin_r, "empty: no load (open)"), (self.zin_c, "empty: none"),
                            (self.zout, "empty: 0 Ω")):
            field.setPlaceholderText(hint)
        form.addRow("Name", self.name)
        form.addRow("Gain (V/V)", self.gain)
        form.addRow("Poles (Hz)", self.poles)
        form.addRow("Zeros (Hz)", self.zeros)
        form.addRow("Input resistance (Ω)", self.zin_r)
        form.addRow("Input capacitance (F)", self.zin_c)
        form.addRow("Output resistance (Ω)", self.zout)
        self.body.addLayout(form)

    def result_value(self) -> dict[str, object]:
        if not self.name.text().strip():
            raise EditRefused("the stage needs a name")
        return {
            "name": self.name.text().strip(),
            "gain": _quantity(self.gain.text(), "the gain", positive=False),
            "poles_hz": parse_roots(self.poles.text(), "pole"),
            "zeros_hz": parse_roots(self.zeros.text(), "zero"),
            "zin_r_ohm": _quantity(self.zin_r.text(), "the input resistance", optional=True),
            "zin_c_f": _quantity(self.zin_c.text(), "the input capacitance", optional=True, positive=False),
            "zout_ohm": _quantity(self.zout.text(), "the output resistance", optional=True, positive=False),
        }


MANUAL = ""  # the metric combo's entry for a manual question


def _metric_words(key: str) -> str:
    """What a metric is, in the table's words: label, unit, frequency rule, places, reference."""
    if key == MANUAL:
        return "A manual question: a reviewer answers it yes, no or not applicable; the answer is recorded."
    entry = METRICS[key]
    unit = f" in {entry.unit}" if entry.unit else " (a ratio)"
    frequency = {"required": "Needs a frequency.", "reference": "At the frequency given, else the project's "
                 "reference frequency.", "unused": "Taken over the whole response; no frequency."}[entry.at_hz]
    places = ", ".join(WHERE_WORDS[where] for where in entry.where)
    # The pass-band reference is stated in words; other reference notes name file keys, which the
    # frequency sentence above already says in words.
    against = f" Taken against {entry.reference}." if entry.referenced else ""
    return f"{entry.label}{unit}. {entry.description} {frequency} Places: {places}.{against}"


class CheckEditorDialog(_ApplyDialog):
    """A stage's checklist: numeric checks on a metric of the metric table, manual questions, and
    checks added from the check library (``resources/checks``). OK replaces the checklist in one
    undoable edit; answers and waivers stay with the checks that keep their ids."""

    def __init__(self, stage: Stage, library: dict[str, list[Check]], apply: Apply,
                 parent: QWidget | None = None) -> None:
        super().__init__(f"Checks of {stage.name}",
                         "A numeric check names a metric, where it is taken and its limits (min, max or both, "
                         "in the metric's unit). A manual question is answered by a reviewer.", apply, parent)
        self._checks: list[Check] = copy.deepcopy(stage.checks)
        self._library = library
        self._loading = False
        self.list = QListWidget()
        self.list.setObjectName("checkList")
        self.list.setWordWrap(True)
        buttons = QHBoxLayout()
        self.add_numeric = QPushButton("New numeric check")
        self.add_question = QPushButton("New question")
        self.remove = QPushButton("Remove")
        for button in (self.add_numeric, self.add_question, self.remove):
            buttons.addWidget(button)
        self.id = QLineEdit()
        self.text = QLineEdit()
        self.metric_choice = QComboBox()
        self.metric_choice.addItem("Manual question (answered by a reviewer)", MANUAL)
        for key, entry in METRICS.items():
            self.metric_choice.addItem(f"{entry.label} ({entry.unit})" if entry.unit else entry.label, key)
        self.metric_words = QLabel("")
        self.metric_words.setWordWrap(True)
        self.metric_words.setObjectName("metricWords")
        self.where = QComboBox()
        self.at_hz = QLineEdit()
        self.minimum = QLineEdit()
        self.maximum = QLineEdit()
        form = QFormLayout()
        form.addRow("Id", self.id)
        form.addRow("Text or question", self.text)
        form.addRow("Metric", self.metric_choice)
        form.addRow("", self.metric_words)
        form.addRow("Where", self.where)
        form.addRow("Frequency (Hz)", self.at_hz)
        form.addRow("Min", self.minimum)
        form.addRow("Max", self.maximum)
        library_box = QGroupBox("Check library")
        self.library_name = QComboBox()
        for name in library:
            self.library_name.addItem(name.replace("_", " "), name)
        self.library_list = QListWidget()
        self.library_list.setObjectName("libraryChecks")
        self.library_list.setWordWrap(True)
        self.add_library = QPushButton("Add ticked checks")
        library_layout = QVBoxLayout(library_box)
        library_layout.addWidget(self.library_name)
        library_layout.addWidget(self.library_list, 1)
        library_layout.addWidget(self.add_library)
        left = QVBoxLayout()
        left.addWidget(self.list, 1)
        left.addLayout(buttons)
        left.addLayout(form)
        columns = QHBoxLayout()
        columns.addLayout(left, 3)
        columns.addWidget(library_box, 2)
        self.body.addLayout(columns)
        self.resize(980, 600)
        self.list.currentRowChanged.connect(self._show_check)
        self.metric_choice.currentIndexChanged.connect(self._metric_changed)
        for field in (self.id, self.text, self.at_hz, self.minimum, self.maximum):
            field.textEdited.connect(self._store)
        self.where.currentIndexChanged.connect(self._store)
        self.add_numeric.clicked.connect(lambda: self.new_check(manual=False))
        self.add_question.clicked.connect(lambda: self.new_check(manual=True))
        self.remove.clicked.connect(self.remove_current)
        self.library_name.currentIndexChanged.connect(self._fill_library)
        self.add_library.clicked.connect(self.add_ticked)
        self._texts: list[dict[str, str]] = [self._as_texts(check) for check in self._checks]
        self._fill_list()
        self._fill_library()
        if self._checks:
            self.list.setCurrentRow(0)
        else:
            self._show_check(-1)

    # --- the list of checks being edited
    @staticmethod
    def _as_texts(check: Check) -> dict[str, str]:
        return {"id": check.id, "text": check.text, "metric": check.metric or MANUAL, "where": check.where,
                "at_hz": _raw(check.at_hz), "min": _raw(check.min), "max": _raw(check.max)}

    def _label(self, texts: dict[str, str]) -> str:
        kind = METRICS[texts["metric"]].label if texts["metric"] in METRICS else "question"
        return f"{texts['id']}: {texts['text'] or '(no text)'} [{kind}]"

    def _fill_list(self) -> None:
        row = self.list.currentRow()
        was = self.list.blockSignals(True)
        self.list.clear()
        for texts in self._texts:
            self.list.addItem(self._label(texts))
        self.list.blockSignals(was)
        if self._texts:
            self.list.setCurrentRow(min(max(row, 0), len(self._texts) - 1))

    def check_ids(self) -> list[str]:
        return [texts["id"] for texts in self._texts]

    def _unique_id(self, base: str) -> str:
        taken = set(self.check_ids())
        candidate, number = base, 1
        while candidate in taken:
            number += 1
            candidate = f"{base}-{number}"
        return candidate

    def new_check(self, manual: bool) -> None:
        metric = MANUAL if manual else "gain_db"
        texts = {"id": self._unique_id("question" if manual else "check"), "text": "", "metric": metric,
                 "where": "in_chain", "at_hz": "", "min": "", "max": ""}
        self._texts.append(texts)
        self._checks.append(Check(id=texts["id"], text=""))
        self._fill_list()
        self.list.setCurrentRow(len(self._texts) - 1)
        self.text.setFocus()

    def remove_current(self) -> None:
        row = self.list.currentRow()
        if 0 <= row < len(self._texts):
            del self._texts[row]
            del self._checks[row]
            self._fill_list()
            if not self._texts:
                self._show_check(-1)

    # --- the form of the selected check
    def _show_check(self, row: int) -> None:
        self._loading = True
        try:
            enabled = 0 <= row < len(self._texts)
            for widget in (self.id, self.text, self.metric_choice, self.where, self.at_hz, self.minimum, self.maximum,
                           self.remove):
                widget.setEnabled(enabled)
            texts = self._texts[row] if enabled else {"id": "", "text": "", "metric": MANUAL, "where": "in_chain",
                                                      "at_hz": "", "min": "", "max": ""}
            self.id.setText(texts["id"])
            self.text.setText(texts["text"])
            self.metric_choice.setCurrentIndex(max(self.metric_choice.findData(texts["metric"]), 0))
            self._metric_changed()
            self.where.setCurrentIndex(max(self.where.findData(texts["where"]), 0))
            self.at_hz.setText(texts["at_hz"])
            self.minimum.setText(texts["min"])
            self.maximum.setText(texts["max"])
        finally:
            self._loading = False

    def _metric_changed(self) -> None:
        key = str(self.metric_choice.currentData())
        self.metric_words.setText(_metric_words(key))
        was = self.where.blockSignals(True)
        chosen = self.where.currentData()
        self.where.clear()
        for where in (METRICS[key].where if key in METRICS else ()):
            self.where.addItem(WHERE_WORDS[where], where)
        index = self.where.findData(chosen)
        self.where.setCurrentIndex(index if index >= 0 else 0)
        self.where.blockSignals(was)
        numeric = key in METRICS
        for widget in (self.where, self.minimum, self.maximum):
            widget.setEnabled(numeric and self.list.currentRow() >= 0)
        self.at_hz.setEnabled(numeric and METRICS[key].at_hz != "unused" and self.list.currentRow() >= 0)
        unit = METRICS[key].unit if numeric else ""
        for field in (self.minimum, self.maximum):
            field.setPlaceholderText(f"in {unit}" if unit else "")
        if not self._loading:
            self._store()

    def _store(self, *_: object) -> None:
        row = self.list.currentRow()
        if self._loading or not 0 <= row < len(self._texts):
            return
        texts = self._texts[row]
        texts.update({"id": self.id.text().strip(), "text": self.text.text(), "metric": str(self.metric_choice.currentData()),
                      "where": str(self.where.currentData() or ""), "at_hz": self.at_hz.text(),
                      "min": self.minimum.text(), "max": self.maximum.text()})
        item = self.list.item(row)
        if item is not None:
            item.setText(self._label(texts))

    # --- the library
    def _fill_library(self, *_: object) -> None:
        self.library_list.clear()
        for check in self._library.get(str(self.library_name.currentData()), []):
            kind = METRICS[check.metric].label if check.metric in METRICS else "question"
            item = QListWidgetItem(f"{check.text} [{kind}]")
            item.setFlags(item.flags() | Qt.ItemFlag.ItemIsUserCheckable)
            item.setCheckState(Qt.CheckState.Unchecked)
            item.setData(Qt.ItemDataRole.UserRole, check.id)
            item.setToolTip(_metric_words(check.metric or MANUAL))
            self.library_list.addItem(item)

    def add_ticked(self) -> list[str]:
        """Add the ticked library checks (ids made unique in the stage); returns the ids added."""
        source = {check.id: check for check in self._library.get(str(self.library_name.currentData()), [])}
        added: list[str] = []
        for index in range(self.library_list.count()):
            item = self.library_list.item(index)
            if item.checkState() != Qt.CheckState.Checked:
                continue
            check = copy.deepcopy(source[str(item.data(Qt.ItemDataRole.UserRole))])
            check.id = self._unique_id(check.id)
            check.answer = check.waiver = None
            self._checks.append(check)
            self._texts.append(self._as_texts(check))
            added.append(check.id)
            item.setCheckState(Qt.CheckState.Unchecked)
        self._fill_list()
        if added:
            self.list.setCurrentRow(len(self._texts) - 1)
        return added

    # --- the result
    def result_value(self) -> list[Check]:
        checks: list[Check] = []
        for texts, original in zip(self._texts, self._checks, strict=True):
            name = texts["id"] or "(no id)"
            if not texts["id"]:
                raise EditRefused("every check needs an id")
            if not texts["text"].strip():
                raise EditRefused(f"check {name} needs a text saying what it asks")
            check = copy.deepcopy(original)
            check.id, check.text = texts["id"], texts["text"].strip()
            if texts["metric"] == MANUAL:
                check.metric, check.at_hz, check.min, check.max = None, None, None, None
                check.where = "in_chain"
            else:
                entry = METRICS[texts["metric"]]
                check.metric, check.where = entry.key, texts["where"] or entry.where[0]
                if check.where not in WHERE_VALUES:
                    raise EditRefused(f"check {name}: choose where the metric is taken")
                check.at_hz = (_quantity(texts["at_hz"], f"check {name}: the frequency", optional=True)
                               if entry.at_hz != "unused" else None)
                if entry.needs_hz and check.at_hz is None:
                    raise EditRefused(f"check {name}: {entry.label.lower()} needs a frequency")
                check.min = _quantity(texts["min"], f"check {name}: min", optional=True, positive=False)
                check.max = _quantity(texts["max"], f"check {name}: max", optional=True, positive=False)
                if check.min is None and check.max is None:
                    raise EditRefused(f"check {name} needs a min, a max or both")
                check.answer = None  # answers belong to manual questions
            checks.append(check)
        return checks


def opamp_key_figures(model: OpampModel) -> list[str]:
    """The figures a designer compares first, as text: GBW, open-loop gain, noise, slew, swing, offset."""
    def shown(value: Quantity | None, unit: str) -> str:
        return "—" if value is None else format_value(value.si, unit)

    swing = "—" if model.swing_v is None else f"{model.swing_v[0].raw} … {model.swing_v[1].raw} V"
    return [shown(model.gbw_hz, "Hz"), "—" if model.a0_db is None else f"{model.a0_db.si:g} dB",
            shown(model.en_v_rthz, "V/√Hz"), shown(model.in_a_rthz, "A/√Hz"),
            shown(model.slew_v_per_s, "V/s"), swing, model.input_type or "—", shown(model.vos_v, "V")]


OPAMP_COLUMNS = ("Model", "GBW", "A0", "e_n", "i_n", "Slew rate", "Output swing", "Input", "Offset (max)")


class OpampLibraryDialog(_ApplyDialog):
    """The op-amp library (``resources/opamps.json``) with each model's key figures.

    OK gives the chosen model to the op-amp; a library model the project lacks is copied into it
    (the file stays self-contained), as stage templates do.
    """

    def __init__(self, library: dict[str, OpampModel], project_models: dict[str, OpampModel], current: str,
                 apply: Apply, part_ref: str = "", parent: QWidget | None = None) -> None:
        super().__init__(f"Op-amp model for {part_ref}" if part_ref else "Op-amp model",
                         "Models of the project first, then the library. Choosing a library model copies it "
                         "into the project.", apply, parent)
        self._rows: list[tuple[str, OpampModel | None]] = [("ideal", None)]
        self._rows += [(name, model) for name, model in sorted(project_models.items())]
        self._rows += [(name, model) for name, model in sorted(library.items()) if name not in project_models]
        self._in_project = set(project_models) | {"ideal"}
        self.table = QTableWidget(len(self._rows), len(OPAMP_COLUMNS))
        self.table.setObjectName("opampTable")
        self.table.setHorizontalHeaderLabels(OPAMP_COLUMNS)
        self.table.verticalHeader().setVisible(False)
        self.table.setSelectionBehavior(QAbstractItemView.SelectionBehavior.SelectRows)
        self.table.setSelectionMode(QAbstractItemView.SelectionMode.SingleSelection)
        self.table.setEditTriggers(QAbstractItemView.EditTrigger.NoEditTriggers)
        self.table.horizontalHeader().setSectionResizeMode(QHeaderView.ResizeMode.ResizeToContents)
        for row, (name, model) in enumerate(self._rows):
            where = "" if name in self._in_project else " (library)"
            cells = [name + where, *(opamp_key_figures(model) if model is not None else
                                     ["∞", "∞", "0", "0", "∞", "any", "—", "0"])]
            for column, text in enumerate(cells):
                item = QTableWidgetItem(text)
                if model is not None and model.description:
                    item.setToolTip(model.description)
                elif model is None:
                    item.setToolTip("The ideal op-amp: infinite gain and bandwidth, no noise, no input current.")
                self.table.setItem(row, column, item)
        self.description = QLabel("")
        self.description.setWordWrap(True)
        self.body.addWidget(self.table, 1)
        self.body.addWidget(self.description)
        self.table.currentCellChanged.connect(lambda row, *_: self._describe(row))
        self.table.cellDoubleClicked.connect(lambda *_: self.accept())
        names = [name for name, _model in self._rows]
        self.table.selectRow(names.index(current) if current in names else 0)
        self.resize(900, 420)

    def _describe(self, row: int) -> None:
        if 0 <= row < len(self._rows):
            name, model = self._rows[row]
            self.description.setText(model.description if model is not None and model.description else name)

    def choose(self, name: str) -> None:
        """Select the row of model ``name`` (as a click on it does)."""
        names = [row_name for row_name, _model in self._rows]
        self.table.selectRow(names.index(name))

    def result_value(self) -> tuple[str, OpampModel | None]:
        row = self.table.currentRow()
        if not 0 <= row < len(self._rows):
            raise EditRefused("choose a model")
        name, model = self._rows[row]
        return name, (copy.deepcopy(model) if name not in self._in_project else None)
