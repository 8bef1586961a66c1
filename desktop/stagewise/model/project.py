"""The project as plain data: parts, stages, the chain and its review records.

No numerics and no Qt here. Numeric fields hold a :class:`~stagewise.model.values.Quantity`
(the text as written and its SI value). The file layer (``stagewise.files``) turns JSON into
these objects and back; the engine reads them; the review layer appends records to them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Final

from stagewise.model.values import Quantity

__all__ = [
    "BLOCK_KIND",
    "CIRCUIT_KIND",
    "PART_TYPES",
    "AuditEvent",
    "Check",
    "Comment",
    "Converter",
    "InputDrive",
    "Load",
    "ManualAnswer",
    "Measurement",
    "OpampModel",
    "Part",
    "Project",
    "Settings",
    "Signoff",
    "Stage",
    "Waiver",
]

FORMAT_NAME: Final = "stagewise-project"
FORMAT_VERSION: Final = 1
GROUND: Final = "0"
CIRCUIT_KIND: Final = "circuit"
BLOCK_KIND: Final = "block"

# Part type -> (number of nodes, node roles, what ``value`` means and its unit symbol).
PART_TYPES: Final[dict[str, tuple[tuple[str, ...], str, str]]] = {
    "R": (("a", "b"), "resistance", "Ω"),
    "C": (("a", "b"), "capacitance", "F"),
    "L": (("a", "b"), "inductance", "H"),
    "vcvs": (("out+", "out-", "in+", "in-"), "voltage gain", ""),
    "vccs": (("out+", "out-", "in+", "in-"), "transconductance", "S"),
    "ccvs": (("out+", "out-"), "transresistance", "Ω"),
    "cccs": (("out+", "out-"), "current gain", ""),
    "opamp": (("in+", "in-", "out"), "", ""),
}
VALUED_TYPES: Final = frozenset({"R", "C", "L", "vcvs", "vccs", "ccvs", "cccs"})
CURRENT_CONTROLLED_TYPES: Final = frozenset({"ccvs", "cccs"})
IDEAL_OPAMP: Final = "ideal"
# Op-amp input stage kinds; they decide how the input bias current follows temperature.
INPUT_TYPES: Final = ("cmos", "jfet", "bipolar")


@dataclass(slots=True)
class Part:
    """One element of a stage.

    ``nodes`` follow the order of :data:`PART_TYPES`. Currents of two-terminal parts are counted
    from ``nodes[0]`` to ``nodes[1]`` through the part; a controlled current source drives its
    current from ``out+`` through the source to ``out-``. ``value`` is the resistance,
    capacitance, inductance, gain, transconductance or transresistance; op-amps have ``model``
    instead, current-controlled sources also ``control`` (the ref of the part whose current
    controls them).
    """

    ref: str
    type: str
    nodes: list[str]
    value: Quantity | None = None
    tol: Quantity | None = None
    control: str | None = None
    model: str | None = None
    # Temperature coefficient of ``value`` in ppm/°C, a bound of either sign (DC budget).
    tc_ppm_per_c: Quantity | None = None


@dataclass(slots=True)
class OpampModel:
    """Parameters of a finite op-amp model (DESIGN 3.2). ``None`` means "not modelled"."""

    a0_db: Quantity
    gbw_hz: Quantity
    p2_hz: Quantity | None = None
    rout_ohm: Quantity | None = None
    rin_ohm: Quantity | None = None
    cin_diff_f: Quantity | None = None
    cin_cm_f: Quantity | None = None
    en_v_rthz: Quantity | None = None
    en_corner_hz: Quantity | None = None
    in_a_rthz: Quantity | None = None
    in_corner_hz: Quantity | None = None
    swing_v: tuple[Quantity, Quantity] | None = None
    slew_v_per_s: Quantity | None = None
    description: str = ""
    # DC errors (the DC accuracy budget, ``engine/dc.py``): bounds at 25 °C unless said.
    # ``input_type`` (cmos | jfet | bipolar) chooses the bias current's temperature law.
    input_type: str | None = None
    vos_v: Quantity | None = None  # input offset voltage, magnitude
    vos_drift_v_per_c: Quantity | None = None  # its drift, magnitude
    ib_a: Quantity | None = None  # input bias current, positive into the pins
    ios_a: Quantity | None = None  # input offset current |Ib+ − Ib−|
    cmrr_db: Quantity | None = None
    psrr_db: Quantity | None = None


@dataclass(slots=True)
class Waiver:
    """A reviewer's decision that a check need not be met, with the reason."""

    by: str
    time: str
    justification: str
    role: str = ""


@dataclass(slots=True)
class ManualAnswer:
    """The recorded answer to a manual check: ``yes`` (met), ``no`` (not met) or ``n/a``."""

    answer: str
    by: str
    time: str
    note: str = ""


@dataclass(slots=True)
class Check:
    """One item of a stage's checklist.

    A numeric check names a ``metric`` (see ``stagewise.review.metrics``), where it is taken
    (``isolated``, ``in_chain``, ``from_input`` or ``chain``), a frequency where the metric needs one, and
    ``min`` and/or ``max``. A manual check has no metric; its ``text`` is the question and
    ``answer`` the recorded answer. Status is computed, never stored.
    """

    id: str
    text: str
    metric: str | None = None
    where: str = "in_chain"
    at_hz: Quantity | None = None
    min: Quantity | None = None
    max: Quantity | None = None
    answer: ManualAnswer | None = None
    waiver: Waiver | None = None

    @property
    def is_manual(self) -> bool:
        return self.metric is None


@dataclass(slots=True)
class Signoff:
    """A reviewer's verdict on a stage, bound to the stage fingerprint it saw."""

    name: str
    role: str
    verdict: str  # "accept" or "rework" (review.words.VERDICTS)
    time: str
    fingerprint: str
    note: str = ""


@dataclass(slots=True)
class Comment:
    """A remark on a stage, or on one of its checks when ``check`` names it."""

    author: str
    time: str
    text: str
    resolved: bool = False
    check: str | None = None


@dataclass(slots=True)
class Stage:
    """One stage of the chain: a small circuit (``kind == "circuit"``) or a behavioural block.

    Block stages use ``gain``, ``zeros_hz``, ``poles_hz`` (each entry a real root frequency in
    hertz, or a complex pair ``(f0_hz, q)``), ``zin_r_ohm``/``zin_c_f`` (input R ∥ C, ``None``
    for absent) and ``zout_ohm``.
    """

    id: str
    name: str
    kind: str = CIRCUIT_KIND
    drive: str = "voltage"
    ports: dict[str, str] = field(default_factory=lambda: {"in": "in", "out": "out"})
    parts: list[Part] = field(default_factory=list)
    checks: list[Check] = field(default_factory=list)
    signoffs: list[Signoff] = field(default_factory=list)
    comments: list[Comment] = field(default_factory=list)
    notes: str = ""
    bypass: bool = False
    # Block stages only.
    gain: Quantity | None = None
    zeros_hz: list[Quantity | tuple[Quantity, Quantity]] = field(default_factory=list)
    poles_hz: list[Quantity | tuple[Quantity, Quantity]] = field(default_factory=list)
    zin_r_ohm: Quantity | None = None
    zin_c_f: Quantity | None = None
    zout_ohm: Quantity | None = None
    # Block stages, DC budget: output offset bound (V) and gain error bound (a fraction).
    offset_v: Quantity | None = None
    gain_error: Quantity | None = None

    @property
    def is_block(self) -> bool:
        return self.kind == BLOCK_KIND

    def part(self, ref: str) -> Part | None:
        """The part named ``ref``, or ``None``."""
        for candidate in self.parts:
            if candidate.ref == ref:
                return candidate
        return None


@dataclass(slots=True)
class Settings:
    """Analysis settings of a project."""

    f_min_hz: Quantity = field(default_factory=lambda: Quantity(1, 1.0))
    f_max_hz: Quantity = field(default_factory=lambda: Quantity(1000000.0, 1e6))
    points_per_decade: int = 100
    temperature_c: Quantity = field(default_factory=lambda: Quantity(25, 25.0))
    ref_hz: Quantity | None = None
    noise_band_hz: tuple[Quantity, Quantity] | None = None
    seed: int = 1
    mc_samples: int = 500
    mc_distribution: str = "uniform"  # or "normal" (tolerance = 3 sigma)
    # Operating temperature range [min, max] in °C for drift (DC budget); None: 25 °C only.
    temp_range_c: tuple[Quantity, Quantity] | None = None
    # Largest change of the op-amps' supply voltage from nominal, V (with psrr_db).
    supply_variation_v: Quantity | None = None
    # Four-eyes rule: whoever last changed a stage (its last "part change" or "import" event)
    # cannot accept it (review.signoff; enforced by review.actions.sign, reported by check).
    four_eyes: bool = False


@dataclass(slots=True)
class InputDrive:
    """What drives the chain: an ideal voltage or current source and its amplitude (peak)."""

    drive: str = "voltage"
    amplitude: Quantity | None = None


@dataclass(slots=True)
class Converter:
    """The analog-to-digital converter at the end of the chain."""

    fs_hz: Quantity | None = None
    bits: int | None = None
    full_scale_vpp: Quantity | None = None


@dataclass(slots=True)
class Load:
    """Optional R ∥ C at the last output (``None`` means absent)."""

    r_ohm: Quantity | None = None
    c_f: Quantity | None = None


@dataclass(slots=True)
class AuditEvent:
    """One link of the hash-chained audit trail (DESIGN section 4)."""

    seq: int
    time: str
    who: str
    what: str
    detail: dict[str, Any]
    prev: str
    hash: str


@dataclass(slots=True)
class Measurement:
    """A bench measurement attached to a stage (``isolated`` or ``in_chain``) or to the chain.

    ``kind`` is ``"response"`` (``f_hz`` with the complex response as ``re``/``im``, in the
    stage's own unit: V/V, or Ω for a current-driven stage) or ``"step"`` (``t_s`` and ``v``,
    a capture in volts). The points are embedded; ``file`` and ``sha256`` name the instrument
    file they were read from, ``source`` says how it was read. ``fingerprint`` is what the
    measured response depended on when it was attached (see
    :func:`stagewise.model.fingerprint.measurement_fingerprint`); the measurement is stale when
    that changes. ``stage`` is ``None`` for a measurement of the whole chain.
    """

    id: str
    kind: str
    where: str
    stage: str | None
    file: str
    sha256: str
    by: str
    time: str
    fingerprint: str
    source: str = ""
    instrument: str = ""
    setup: str = ""
    note: str = ""
    f_hz: list[float] = field(default_factory=list)
    re: list[float] = field(default_factory=list)
    im: list[float] = field(default_factory=list)
    t_s: list[float] = field(default_factory=list)
    v: list[float] = field(default_factory=list)


@dataclass(slots=True)
class Project:
    """A whole project: settings, the chain of stages and the audit trail."""

    title: str
    revision: str = ""
    settings: Settings = field(default_factory=Settings)
    input: InputDrive = field(default_factory=InputDrive)
    converter: Converter = field(default_factory=Converter)
    load: Load = field(default_factory=Load)
    opamp_models: dict[str, OpampModel] = field(default_factory=dict)
    stages: list[Stage] = field(default_factory=list)
    measurements: list[Measurement] = field(default_factory=list)
    audit: list[AuditEvent] = field(default_factory=list)

    def stage(self, stage_id: str) -> Stage | None:
        """The stage with ``stage_id``, or ``None``."""
        for candidate in self.stages:
            if candidate.id == stage_id:
                return candidate
        return None

    @property
    def active_stages(self) -> list[Stage]:
        """The stages in the chain, in order (bypassed stages left out)."""
        return [stage for stage in self.stages if not stage.bypass]

