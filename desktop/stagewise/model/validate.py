"""Semantic validation of a project: every problem with its JSON path.

The file decoder checks types and syntax; this module checks meaning: part types and their
node counts, duplicate references, controlled sources naming missing parts, ports that name no
node, nodes whose voltage nothing determines (no path to node 0 through a part, a voltage
drive or an op-amp output), op-amp models that do not exist, settings out of range.
"""

from __future__ import annotations

import math

from stagewise.model.project import (
    CURRENT_CONTROLLED_TYPES,
    GROUND,
    IDEAL_OPAMP,
    PART_TYPES,
    VALUED_TYPES,
    Project,
    Stage,
)
from stagewise.model.values import Quantity, unit_mismatch, unit_symbol

__all__ = ["KNOWN_METRICS_HOOK", "METRIC_UNITS_HOOK", "validate", "validate_stage"]

ABSOLUTE_ZERO_C = -273.15
# Beyond this a sweep (and the GUI) would stall: 20 decades at 10000 points per decade.
MAX_FREQUENCY_POINTS = 200_000

# What each valued part type takes, in the words of a sentence about a wrong unit.
PART_TAKES = {
    "R": "a resistor takes ohms",
    "C": "a capacitor takes farads",
    "L": "an inductor takes henries",
    "vcvs": "a voltage-controlled voltage source takes a plain gain (no unit)",
    "vccs": "a voltage-controlled current source takes a transconductance in siemens",
    "ccvs": "a current-controlled voltage source takes a transresistance in ohms",
    "cccs": "a current-controlled current source takes a plain gain (no unit)",
}
# Op-amp model fields and the unit each takes (noise densities are per root hertz: their unit
# cannot be written after a value, so only a bare number or a plain V or A is accepted there).
OPAMP_UNITS = {"a0_db": "dB", "gbw_hz": "Hz", "p2_hz": "Hz", "rout_ohm": "Ω", "rin_ohm": "Ω", "cin_diff_f": "F",
               "cin_cm_f": "F", "en_v_rthz": "V", "en_corner_hz": "Hz", "in_a_rthz": "A", "in_corner_hz": "Hz",
               "slew_v_per_s": "V/s", "vos_v": "V", "ib_a": "A", "ios_a": "A", "cmrr_db": "dB", "psrr_db": "dB",
               # a drift per kelvin cannot be written after a value: a bare number or a plain V
               "vos_drift_v_per_c": "V"}
UNIT_NAMES = {"dB": "decibels", "Hz": "hertz", "Ω": "ohms", "F": "farads", "V": "volts", "A": "amperes",
              "V/s": "volts per second", "": "a plain number (no unit)"}

# The review layer registers the table of metric keys here so that the model can check names
# without importing it (keeps the model free of the layers above it).
KNOWN_METRICS_HOOK: list[frozenset[str]] = []
# ... and the unit of each metric's value (the table's unit), for the units of a check's limits.
METRIC_UNITS_HOOK: list[dict[str, str]] = []
# A metric's unit -> the unit symbol its limits may be written with ("" a plain number); units
# left out (V/V, a transimpedance where the drive is a current) are not checked.
_LIMIT_UNITS = {"Hz": "Hz", "V": "V", "dB": "dB", "s": "s", "Ω": "Ω", "°": "", "LSB": "", "": "", "V/°C": "V"}

# Names other tools read elsewhere that are metrics under another name: a check naming one is told.
_METRIC_HINTS: dict[str, str] = {
    "gain": " (the DC gain, the gain of analyze --json's dc object, is the metric dc_gain; the gain at a "
            "frequency is gain_db)",
}


def validate(project: Project) -> list[str]:
    """Every semantic problem of ``project``, each as ``"json.path: sentence"``."""
    problems: list[str] = []
    settings = project.settings
    if settings.f_min_hz.si >= settings.f_max_hz.si:
        problems.append(f"settings.f_min_hz: {settings.f_min_hz.raw} must be below f_max_hz ({settings.f_max_hz.raw})")
    if not 1 <= settings.points_per_decade <= 10000:
        problems.append(f"settings.points_per_decade: {settings.points_per_decade} must be between 1 and 10000")
    if settings.temperature_c.si <= ABSOLUTE_ZERO_C:
        problems.append(f"settings.temperature_c: {settings.temperature_c.raw} °C is at or below absolute zero "
                        "(−273.15 °C), a negative temperature in kelvin")
    if settings.ref_hz is not None and not (settings.f_min_hz.si <= settings.ref_hz.si <= settings.f_max_hz.si):
        problems.append(f"settings.ref_hz: {settings.ref_hz.raw} Hz lies outside the analysed range "
                        f"f_min_hz … f_max_hz ({settings.f_min_hz.raw} … {settings.f_max_hz.raw})")
    if settings.f_min_hz.si < settings.f_max_hz.si and 1 <= settings.points_per_decade:
        points = math.log10(settings.f_max_hz.si / settings.f_min_hz.si) * settings.points_per_decade
        if points > MAX_FREQUENCY_POINTS:
            problems.append(f"settings.points_per_decade: {points:.0f} frequency points over the range is more "
                            f"than {MAX_FREQUENCY_POINTS}; lower points_per_decade or narrow the range")
    if settings.noise_band_hz is not None and settings.noise_band_hz[0].si >= settings.noise_band_hz[1].si:
        problems.append("settings.noise_band_hz: the lower edge must be below the upper edge")
    if not 1 <= settings.mc_samples <= 1_000_000:
        problems.append(f"settings.mc_samples: {settings.mc_samples} must be between 1 and 1000000")
    if settings.seed < 0:
        problems.append(f"settings.seed: {settings.seed} must not be negative")
    if settings.temp_range_c is not None:
        low, high = settings.temp_range_c
        if low.si >= high.si:
            problems.append(f"settings.temp_range_c: the low end ({low.raw} °C) must be below the high end "
                            f"({high.raw} °C)")
        elif low.si <= ABSOLUTE_ZERO_C:
            problems.append(f"settings.temp_range_c: {low.raw} °C is at or below absolute zero (−273.15 °C)")
    converter = project.converter
    if converter.bits is not None and not 1 <= converter.bits <= 32:
        problems.append(f"converter.bits: {converter.bits} must be between 1 and 32")
    for name, model in project.opamp_models.items():
        if name == IDEAL_OPAMP:
            problems.append(f'opamp_models.{name}: "{IDEAL_OPAMP}" is reserved for the ideal op-amp; '
                            "give the model another name")
        if model.a0_db.si > 300:
            problems.append(f"opamp_models.{name}.a0_db: {model.a0_db.raw} dB is beyond any amplifier; use \"ideal\"")
        if model.swing_v is not None and model.swing_v[0].si >= model.swing_v[1].si:
            problems.append(f"opamp_models.{name}.swing_v: the low limit must be below the high limit")
        for key, unit in OPAMP_UNITS.items():
            quantity: Quantity | None = getattr(model, key)
            if quantity is not None:
                mismatch = unit_mismatch(quantity.raw, unit, f"{key} takes {UNIT_NAMES[unit]}")
                if mismatch is not None:
                    problems.append(f"opamp_models.{name}.{key}: {mismatch}")
        for index, limit in enumerate(model.swing_v or ()):
            mismatch = unit_mismatch(limit.raw, "V", "swing_v takes volts")
            if mismatch is not None:
                problems.append(f"opamp_models.{name}.swing_v[{index}]: {mismatch}")
    problems.extend(_field_unit_problems(project))
    seen_ids: set[str] = set()
    for index, stage in enumerate(project.stages):
        if stage.id in seen_ids:
            problems.append(f'stages[{index}].id: "{stage.id}" is used by another stage')
        seen_ids.add(stage.id)
        problems.extend(validate_stage(stage, project, f"stages[{index}]"))
    problems.extend(_measurement_problems(project))
    return problems


def _limit_unit_problems(metric: str, low: Quantity | None, high: Quantity | None, at_hz: Quantity | None,
                         where: str) -> list[str]:
    """A check's limits written with another quantity's unit than its metric's, and ``at_hz`` not in hertz.

    A percentage metric (``overshoot_pct``…) is already in percent: ``"5%"`` would be read as
    0.05 (%), so it is refused with the number to write instead.
    """
    problems: list[str] = []
    if at_hz is not None:
        mismatch = unit_mismatch(at_hz.raw, "Hz", "at_hz takes hertz")
        if mismatch is not None:
            problems.append(f"{where}.at_hz: {mismatch}")
    unit = METRIC_UNITS_HOOK[0].get(metric) if METRIC_UNITS_HOOK else None
    for key, limit in (("min", low), ("max", high)):
        if limit is None or unit is None:
            continue
        if unit == "%":
            if unit_symbol(limit.raw) == "%":
                problems.append(f'{where}.{key}: "{limit.raw}" would be read as the fraction {limit.si:g}; '
                                f"{metric} is already in percent, so write {limit.si * 100:g}")
                continue
            mismatch = unit_mismatch(limit.raw, "", f"{metric} is in percent (a plain number)")
        elif unit in _LIMIT_UNITS:
            expected = _LIMIT_UNITS[unit]
            mismatch = unit_mismatch(limit.raw, expected, f"{metric} is in {unit or 'a plain number'}")
        else:
            mismatch = None
        if mismatch is not None:
            problems.append(f"{where}.{key}: {mismatch}")
    return problems


def _field_unit_problems(project: Project) -> list[str]:
    """Settings, input, converter, load and block-stage fields written with another quantity's unit.

    The same rule as part values and op-amp model fields: a bare number takes the field's unit,
    a written unit must be that one ("fs_hz": "10nF" is a capacitance, not a frequency).
    """
    settings, converter, load = project.settings, project.converter, project.load
    fields: list[tuple[str, Quantity | None, str]] = [
        ("settings.f_min_hz", settings.f_min_hz, "Hz"), ("settings.f_max_hz", settings.f_max_hz, "Hz"),
        ("settings.ref_hz", settings.ref_hz, "Hz"), ("settings.temperature_c", settings.temperature_c, ""),
        ("settings.supply_variation_v", settings.supply_variation_v, "V"),
        ("input.amplitude", project.input.amplitude, "A" if project.input.drive == "current" else "V"),
        ("converter.fs_hz", converter.fs_hz, "Hz"), ("converter.full_scale_vpp", converter.full_scale_vpp, "V"),
        ("load.r_ohm", load.r_ohm, "Ω"), ("load.c_f", load.c_f, "F"),
    ]
    for key, pair, unit in (("noise_band_hz", settings.noise_band_hz, "Hz"), ("temp_range_c", settings.temp_range_c, "")):
        fields += [(f"settings.{key}[{index}]", quantity, unit) for index, quantity in enumerate(pair or ())]
    for index, stage in enumerate(project.stages):
        path = f"stages[{index}]"
        fields += [(f"{path}.zin.r_ohm", stage.zin_r_ohm, "Ω"), (f"{path}.zin.c_f", stage.zin_c_f, "F"),
                   (f"{path}.zout_ohm", stage.zout_ohm, "Ω"), (f"{path}.offset_v", stage.offset_v, "V"),
                   # a block's gain is V/V, or V/A (ohms) for a current-driven block
                   (f"{path}.gain", stage.gain, "Ω" if stage.drive == "current" else "")]
        for key in ("zeros_hz", "poles_hz"):
            for number, root in enumerate(getattr(stage, key)):
                if isinstance(root, tuple):
                    fields += [(f"{path}.{key}[{number}][0]", root[0], "Hz"), (f"{path}.{key}[{number}][1]", root[1], "")]
                else:
                    fields.append((f"{path}.{key}[{number}]", root, "Hz"))
    problems: list[str] = []
    for path, quantity, unit in fields:
        if quantity is None:
            continue
        name = "Q" if path.endswith("][1]") else path.rsplit(".", 1)[-1].split("[", 1)[0]
        mismatch = unit_mismatch(quantity.raw, unit, f"{name} takes {UNIT_NAMES[unit]}")
        if mismatch is not None:
            problems.append(f"{path}: {mismatch}")
    return problems


# Must match stagewise.files.measurements.MAX_POINTS (the model does not import the file layer).
MAX_MEASUREMENT_POINTS = 20_000


def _measurement_problems(project: Project) -> list[str]:
    """Measurements: unique ids, a stage that exists where one is needed, columns of equal length,
    finite numbers, an axis that rises, a SHA-256 that looks like one."""
    problems: list[str] = []
    seen: set[str] = set()
    for index, measurement in enumerate(project.measurements):
        path = f"measurements[{index}]"
        if measurement.id in seen:
            problems.append(f'{path}.id: "{measurement.id}" is used by another measurement')
        seen.add(measurement.id)
        if measurement.where == "chain":
            if measurement.stage is not None:
                problems.append(f'{path}.stage: a measurement of the whole chain names no stage; write null')
        elif measurement.stage is None or project.stage(measurement.stage) is None:
            problems.append(f'{path}.stage: "{measurement.stage}" is not a stage of this project')
        if len(measurement.sha256) != 64 or any(ch not in "0123456789abcdef" for ch in measurement.sha256):
            problems.append(f"{path}.sha256: not 64 lower-case hexadecimal digits")
        columns = ("f_hz", "re", "im") if measurement.kind == "response" else ("t_s", "v")
        lengths = {len(getattr(measurement, key)) for key in columns}
        if len(lengths) != 1:
            problems.append(f"{path}.data: the columns {', '.join(columns)} differ in length")
            continue
        count = lengths.pop()
        if not 2 <= count <= MAX_MEASUREMENT_POINTS:
            problems.append(f"{path}.data: {count} points; a measurement holds 2 to {MAX_MEASUREMENT_POINTS}")
        for key in columns:
            values = getattr(measurement, key)
            bad = next((position for position, value in enumerate(values) if not math.isfinite(value)), None)
            if bad is not None:
                problems.append(f"{path}.data.{key}[{bad}]: not a finite number")
        axis = getattr(measurement, columns[0])
        if measurement.kind == "response" and any(value <= 0 for value in axis):
            problems.append(f"{path}.data.f_hz: frequencies must be greater than zero")
        step = next((position for position in range(1, len(axis)) if not axis[position] > axis[position - 1]), None)
        if step is not None:
            problems.append(f"{path}.data.{columns[0]}[{step}]: does not rise above the value before it")
    return problems


def validate_stage(stage: Stage, project: Project, path: str) -> list[str]:
    """Problems of one stage; ``path`` is its JSON path (``stages[2]``)."""
    problems: list[str] = []
    known_metrics = KNOWN_METRICS_HOOK[0] if KNOWN_METRICS_HOOK else None
    check_ids: set[str] = set()
    for index, check in enumerate(stage.checks):
        where = f"{path}.checks[{index}]"
        if check.id in check_ids:
            problems.append(f'{where}.id: "{check.id}" is used by another check of this stage')
        check_ids.add(check.id)
        if check.metric is not None:
            if known_metrics is not None and check.metric not in known_metrics:
                hint = _METRIC_HINTS.get(check.metric, "")
                problems.append(f'{where}.metric: "{check.metric}" is not a metric Stagewise computes{hint}')
            if check.min is None and check.max is None:
                problems.append(f"{where}: a numeric check needs min, max or both")
            if check.min is not None and check.max is not None and check.min.si > check.max.si:
                problems.append(f"{where}.min: {check.min.raw} is above max ({check.max.raw})")
            problems.extend(_limit_unit_problems(check.metric, check.min, check.max, check.at_hz, where))
    for index, comment in enumerate(stage.comments):
        if comment.check is not None and comment.check not in check_ids:
            problems.append(f'{path}.comments[{index}].check: "{comment.check}" names no check of this stage')
    if stage.is_block:
        if stage.gain is None:
            problems.append(f"{path}.gain: a block stage needs a gain")
        if stage.parts:
            problems.append(f"{path}.parts: a block stage has no parts; use kind \"circuit\"")
        problems.extend(_block_root_problems(stage, path))
        return problems
    nodes: set[str] = set()
    refs: dict[str, int] = {}
    for index, part in enumerate(stage.parts):
        where = f"{path}.parts[{index}]"
        if part.ref in refs:
            problems.append(f'{where}.ref: "{part.ref}" is used by parts[{refs[part.ref]}] too')
        else:
            refs[part.ref] = index
        if part.type not in PART_TYPES:
            problems.append(f'{where}.type: "{part.type}" is not a part type; use one of {", ".join(PART_TYPES)}')
            continue
        roles = PART_TYPES[part.type][0]
        if len(part.nodes) != len(roles):
            problems.append(f"{where}.nodes: a {part.type} has {len(roles)} nodes ({', '.join(roles)}), "
                            f"found {len(part.nodes)}")
        nodes.update(part.nodes)
        if part.type in VALUED_TYPES:
            if part.value is None:
                problems.append(f"{where}.value: a {part.type} needs a value ({PART_TYPES[part.type][1]})")
            elif part.type in ("R", "C", "L") and not part.value.si > 0:
                problems.append(f"{where}.value: {part.value.raw} must be greater than zero")
            if part.value is not None:
                mismatch = unit_mismatch(part.value.raw, PART_TYPES[part.type][2], PART_TAKES[part.type])
                if mismatch is not None:
                    problems.append(f"{where}.value: {mismatch}")

        elif part.value is not None:
            problems.append(f"{where}.value: an op-amp takes a model, not a value")
        if part.type == "opamp":
            if part.model is None:
                problems.append(f'{where}.model: an op-amp needs a model ("ideal" or one of opamp_models)')
            elif part.model != IDEAL_OPAMP and part.model not in project.opamp_models:
                problems.append(f'{where}.model: "{part.model}" is not an op-amp model of this project')
        elif part.model is not None:
            problems.append(f"{where}.model: only op-amps take a model")
        if part.type in CURRENT_CONTROLLED_TYPES:
            if part.control is None:
                problems.append(f"{where}.control: a {part.type} needs the ref of the part whose current controls it")
        elif part.control is not None:
            problems.append(f"{where}.control: only ccvs and cccs take a control")
    for index, part in enumerate(stage.parts):
        if part.type in CURRENT_CONTROLLED_TYPES and part.control is not None:
            target = stage.part(part.control)
            if target is None:
                problems.append(f'{path}.parts[{index}].control: "{part.control}" is not a part of this stage')
            elif target.type not in ("R", "C", "L", "vcvs", "ccvs"):
                problems.append(f'{path}.parts[{index}].control: the current of "{part.control}" '
                                f"({target.type}) cannot control a source; use an R, C, L or voltage source")
    for port in ("in", "out"):
        node = stage.ports.get(port, "")
        if node != GROUND and node not in nodes:
            problems.append(f'{path}.ports.{port}: "{node}" is not a node of any part')
    if stage.ports.get("in") == GROUND or stage.ports.get("out") == GROUND:
        problems.append(f"{path}.ports: a port cannot be node 0 (the common reference)")
    # Solvability, not whether a part names node 0: a series resistor or capacitor, or a bare
    # follower, is referenced to node 0 by its voltage drive and by the op-amp's output. What
    # must be refused is a node whose voltage nothing determines.
    if stage.parts:
        unreached = _nodes_without_path_to_ground(stage)
        if unreached:
            names = ", ".join(f'"{node}"' for node in sorted(unreached))
            current = (" (a current drive sets a current, not a voltage, so it is no path)"
                       if stage.drive == "current" and stage.ports.get("in") in unreached else "")
            problems.append(f"{path}.parts: node{'s' if len(unreached) > 1 else ''} {names} "
                            f"{'have' if len(unreached) > 1 else 'has'} no path to node 0{current}")
    return problems


def _block_root_problems(stage: Stage, path: str) -> list[str]:
    """Poles must lie in the left half-plane (f > 0); a block needs no more zeros than poles."""
    problems: list[str] = []
    order = {"zeros_hz": 0, "poles_hz": 0}
    for key, roots in (("zeros_hz", stage.zeros_hz), ("poles_hz", stage.poles_hz)):
        for index, root in enumerate(roots):
            if isinstance(root, tuple):
                order[key] += 2
                continue
            order[key] += 1
            if key == "poles_hz" and not root.si > 0:
                problems.append(f"{path}.poles_hz[{index}]: a pole at {root.raw} Hz is not stable; a block's "
                                "poles need a frequency above 0 (a real pole at s = −2πf)")
    if order["zeros_hz"] > order["poles_hz"]:
        problems.append(f"{path}.zeros_hz: {order['zeros_hz']} zeros against {order['poles_hz']} poles; a block "
                        "needs at least as many poles as zeros, or its gain grows without bound")
    return problems


def _nodes_without_path_to_ground(stage: Stage) -> set[str]:
    """Nodes not connected to node 0 through any part (controlled-source inputs do not connect)."""
    parent: dict[str, str] = {}

    def find(node: str) -> str:
        parent.setdefault(node, node)
        while parent[node] != node:
            parent[node] = parent[parent[node]]
            node = parent[node]
        return node

    def join(a: str, b: str) -> None:
        parent[find(a)] = find(b)

    all_nodes: set[str] = set()
    # A voltage drive ties the input port to node 0 (it sets its voltage); a current drive only
    # injects a current, so the input port must find a path of its own.
    if stage.drive != "current":
        join(stage.ports.get("in", GROUND), GROUND)
    for part in stage.parts:
        all_nodes.update(part.nodes)
        if part.type not in PART_TYPES or len(part.nodes) != len(PART_TYPES[part.type][0]):
            continue
        if part.type in ("R", "C", "L", "ccvs", "cccs"):
            join(part.nodes[0], part.nodes[1])
        elif part.type in ("vcvs", "vccs"):
            join(part.nodes[0], part.nodes[1])
            find(part.nodes[2])
            find(part.nodes[3])
        elif part.type == "opamp":
            # The output is driven against node 0; the inputs connect through input impedance
            # only in finite models, so they must find their own path.
            join(part.nodes[2], GROUND)
            find(part.nodes[0])
            find(part.nodes[1])
    ground = find(GROUND)
    return {node for node in all_nodes if find(node) != ground}
