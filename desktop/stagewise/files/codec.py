"""JSON <-> model for project files (format version 1, DESIGN section 5).

``decode`` reads a parsed JSON document into a :class:`~stagewise.model.project.Project`,
collecting *every* problem with its JSON path (``stages[2].parts[4].value: "4k7x" is not a
value``) instead of stopping at the first. ``encode`` writes the model back with keys in a fixed
order, so that a canonical file round-trips byte for byte.

Values are parsed with :func:`stagewise.model.values.parse_value` only; nothing from a file is
ever evaluated.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, TypeVar

from stagewise.model.project import (
    BLOCK_KIND,
    CIRCUIT_KIND,
    FORMAT_NAME,
    FORMAT_VERSION,
    INPUT_TYPES,
    AuditEvent,
    Check,
    Comment,
    Converter,
    InputDrive,
    Load,
    ManualAnswer,
    Measurement,
    OpampModel,
    Part,
    Project,
    Settings,
    Signoff,
    Stage,
    Waiver,
)
from stagewise.model.values import Quantity, ValueSyntaxError
from stagewise.review.words import OLDER_VERDICTS, VERDICTS, current_verdict

__all__ = ["JsonObject", "ProjectFileError", "decode", "dumps", "encode"]

T = TypeVar("T")


class ProjectFileError(ValueError):
    """A project document that cannot be read. ``problems`` lists each with its JSON path."""

    def __init__(self, problems: list[str], source: str = "") -> None:
        self.problems = list(problems)
        self.source = source
        where = f"{source}: " if source else ""
        if len(problems) == 1:
            message = f"{where}{problems[0]}"
        else:
            message = f"{where}{len(problems)} problems: " + "; ".join(problems)
        super().__init__(message)


class JsonObject(dict[str, Any]):
    """A JSON object that remembers keys written more than once (``json`` keeps the last).

    The loader parses with :meth:`from_pairs` as ``object_pairs_hook``; the decoder reports
    each repeated key with its path instead of silently dropping a value.
    """

    duplicate_keys: tuple[str, ...] = ()

    @classmethod
    def from_pairs(cls, pairs: list[tuple[str, Any]]) -> JsonObject:
        result = cls(pairs)
        if len(result) != len(pairs):
            seen: set[str] = set()
            repeated: list[str] = []
            for key, _ in pairs:
                if key in seen and key not in repeated:
                    repeated.append(key)
                seen.add(key)
            result.duplicate_keys = tuple(repeated)
        return result


class _Reader:
    """Walks a JSON document, collecting problems with their paths."""

    def __init__(self) -> None:
        self.problems: list[str] = []
        self._path: list[str] = []

    @property
    def path(self) -> str:
        text = ""
        for piece in self._path:
            text += piece if piece.startswith("[") or not text else f".{piece}"
        return text or "(document)"

    @contextmanager
    def at(self, piece: str | int) -> Iterator[None]:
        self._path.append(f"[{piece}]" if isinstance(piece, int) else piece)
        try:
            yield
        finally:
            self._path.pop()

    def problem(self, message: str) -> None:
        self.problems.append(f"{self.path}: {message}")

    def mapping(self, data: object, allowed: tuple[str, ...], required: tuple[str, ...] = ()) -> dict[str, Any] | None:
        if not isinstance(data, dict):
            self.problem(f"expected an object, found {_describe(data)}")
            return None
        for key in getattr(data, "duplicate_keys", ()):
            self.problem(f'the key "{key}" is written more than once; keep one')
        for key in data:
            if key not in allowed:
                self.problem(f'unknown key "{key}"; allowed here: {", ".join(allowed)}')
        for key in required:
            if key not in data:
                self.problem(f'missing key "{key}"')
        return data

    def field(self, data: dict[str, Any], key: str, read: Callable[[object], T], default: T) -> T:
        if key not in data:
            return default
        with self.at(key):
            try:
                return read(data[key])
            except (ValueError, TypeError) as error:
                self.problem(str(error))
                return default

    def items(self, data: dict[str, Any], key: str) -> Iterator[tuple[int, Any]]:
        if key not in data or data[key] is None:
            return
        with self.at(key):
            value = data[key]
            if not isinstance(value, list):
                self.problem(f"expected a list, found {_describe(value)}")
                return
        for index, item in enumerate(value):
            with self.at(key), self.at(index):
                yield index, item

    # The first name of ``mapping``, still used by other readers (templates); defined last so
    # that ``object`` in the annotations above means the builtin.
    object = mapping


def _describe(value: object) -> str:
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        shown = value if len(value) <= 40 else value[:37] + "…"
        return f'"{shown}"'
    if isinstance(value, list):
        return "a list" if value else "an empty list"
    if isinstance(value, dict):
        return "an object" if value else "an empty object"
    return repr(value)


# -- field readers: each raises ValueError with a sentence (the path is added by _Reader) -----


def _quantity(value: object) -> Quantity:
    try:
        return Quantity.of(value)
    except ValueSyntaxError as error:
        if isinstance(value, str):
            raise ValueError(str(error)) from error  # quotes the text, says why or what is accepted
        if isinstance(value, int | float) and not isinstance(value, bool):
            raise ValueError(f"{_describe(value)} is not a finite value") from error
        raise ValueError(f"{_describe(value)} is not a value; expected a JSON number or "
                         f"text such as 4k7, 2.2u, 10nF or 1Meg") from error


def _optional_quantity(value: object) -> Quantity | None:
    return None if value is None else _quantity(value)


def _positive(value: object) -> Quantity:
    quantity = _quantity(value)
    if not quantity.si > 0:
        raise ValueError(f"{_describe(value)} must be greater than zero")
    return quantity


def _optional_positive(value: object) -> Quantity | None:
    return None if value is None else _positive(value)


# No amplifier's gain-bandwidth or pole comes near 1 THz; past it the model's time constants
# fall below what a double resolves beside the other parts' (1e300 Hz gave NaN everywhere).
MAX_AMPLIFIER_HZ = 1e12


def _amplifier_frequency(value: object) -> Quantity:
    quantity = _positive(value)
    if quantity.si > MAX_AMPLIFIER_HZ:
        raise ValueError(f"{_describe(value)} Hz is beyond any amplifier (at most 1 THz); use the model "
                         '"ideal" for an amplifier much faster than the circuit')
    return quantity


def _nonnegative(value: object) -> Quantity:
    quantity = _quantity(value)
    if quantity.si < 0:
        raise ValueError(f"{_describe(value)} must not be negative")
    return quantity


def _optional_nonnegative(value: object) -> Quantity | None:
    return None if value is None else _nonnegative(value)


def _tolerance(value: object) -> Quantity | None:
    if value is None:
        return None
    quantity = _quantity(value)
    if not 0 <= quantity.si < 1:
        raise ValueError(f"{_describe(value)} is not a tolerance; give a fraction below 1 or a percentage such as 1%")
    return quantity


def _text(value: object) -> str:
    if not isinstance(value, str):
        raise ValueError(f"expected text, found {_describe(value)}")
    return value


def _name(value: object) -> str:
    text = _text(value)
    if not text.strip():
        raise ValueError("must not be empty")
    if len(text) > 200:
        raise ValueError("is longer than 200 characters")
    return text


def _optional_text(value: object) -> str | None:
    return None if value is None else _text(value)


def _boolean(value: object) -> bool:
    if not isinstance(value, bool):
        raise ValueError(f"expected true or false, found {_describe(value)}")
    return value


def _integer(value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise ValueError(f"expected a whole number, found {_describe(value)}")
    return value


def _choice(*choices: str) -> Callable[[object], str]:
    def read(value: object) -> str:
        if value not in choices:
            raise ValueError(f"{_describe(value)} is not one of {', '.join(choices)}")
        return str(value)

    return read


def _verdict(value: object) -> str:
    """A sign-off's verdict; an older release's word is read as today's (the file is migrated)."""
    if value not in VERDICTS and value not in OLDER_VERDICTS:
        raise ValueError(f"{_describe(value)} is not one of {', '.join(VERDICTS)}")
    return current_verdict(str(value))


def _pair(read: Callable[[object], T]) -> Callable[[object], tuple[T, T]]:
    def read_pair(value: object) -> tuple[T, T]:
        if not isinstance(value, list) or len(value) != 2:
            raise ValueError(f"expected a list of two values, found {_describe(value)}")
        return read(value[0]), read(value[1])

    return read_pair


def _nodes(value: object) -> list[str]:
    if not isinstance(value, list) or not value:
        raise ValueError(f"expected a list of node names, found {_describe(value)}")
    nodes: list[str] = []
    for index, node in enumerate(value):
        if isinstance(node, int) and not isinstance(node, bool):
            node = str(node)
        if not isinstance(node, str) or not node.strip():
            raise ValueError(f"node {index + 1} is {_describe(node)}, not a node name")
        nodes.append(node)
    return nodes


def _root(value: object) -> Quantity | tuple[Quantity, Quantity]:
    if isinstance(value, list):
        if len(value) != 2:
            raise ValueError(f"expected a frequency or a pair [f0_hz, Q], found a list of {len(value)}")
        frequency, quality = _positive(value[0]), _positive(value[1])
        return frequency, quality
    return _quantity(value)


# -- decode ----------------------------------------------------------------------------------

_TOP_KEYS = ("format", "version", "title", "revision", "settings", "input", "converter", "load",
             "opamp_models", "stages", "measurements", "audit")
_SETTINGS_KEYS = ("f_min_hz", "f_max_hz", "points_per_decade", "temperature_c", "ref_hz",
                  "noise_band_hz", "seed", "mc_samples", "mc_distribution", "temp_range_c",
                  "supply_variation_v", "four_eyes")
_OPAMP_KEYS = ("description", "a0_db", "gbw_hz", "p2_hz", "rout_ohm", "rin_ohm", "cin_diff_f",
               "cin_cm_f", "en_v_rthz", "en_corner_hz", "in_a_rthz", "in_corner_hz", "swing_v",
               "slew_v_per_s", "input_type", "vos_v", "vos_drift_v_per_c", "ib_a", "ios_a", "cmrr_db",
               "psrr_db")
_STAGE_KEYS = ("id", "name", "kind", "drive", "bypass", "ports", "parts", "gain", "zeros_hz",
               "poles_hz", "zin", "zout_ohm", "offset_v", "gain_error", "checks", "signoffs", "comments", "notes")
_PART_KEYS = ("ref", "type", "nodes", "value", "tol", "tc_ppm_per_c", "control", "model")
_CHECK_KEYS = ("id", "text", "metric", "where", "at_hz", "min", "max", "answer", "waiver")
_SIGNOFF_KEYS = ("name", "role", "verdict", "note", "time", "fingerprint")
_COMMENT_KEYS = ("author", "time", "text", "check", "resolved")
_EVENT_KEYS = ("seq", "time", "who", "what", "detail", "prev", "hash")
_MEASUREMENT_KEYS = ("id", "kind", "where", "stage", "file", "sha256", "source", "by", "time", "instrument",
                     "setup", "note", "fingerprint", "data")
_MEASUREMENT_COLUMNS = {"response": ("f_hz", "re", "im"), "step": ("t_s", "v")}


def decode(document: object, source: str = "") -> Project:
    """Build a project from a parsed JSON document (already migrated to the current version).

    Raises
    ------
    ProjectFileError
        Listing every problem found, each with its JSON path.
    """
    reader = _Reader()
    data = reader.mapping(document, _TOP_KEYS, ("format", "version", "title", "stages"))
    if data is None:
        raise ProjectFileError(reader.problems, source)
    if "format" in data and data["format"] != FORMAT_NAME:
        with reader.at("format"):
            reader.problem(f'{_describe(data["format"])} is not a Stagewise project (expected "{FORMAT_NAME}")')
    version = data.get("version")
    # `true` and `1.0` compare equal to 1 in Python; the format's version is the integer itself.
    if "version" in data and (type(version) is not int or version != FORMAT_VERSION):
        with reader.at("version"):
            reader.problem(f"{_describe(version)} is not version {FORMAT_VERSION}; write the whole number "
                           f"{FORMAT_VERSION}")
    project = Project(title=reader.field(data, "title", _name, ""))
    project.revision = reader.field(data, "revision", _text, "")
    with reader.at("settings"):
        project.settings = _decode_settings(reader, data.get("settings", {}))
    with reader.at("input"):
        project.input = _decode_input(reader, data.get("input", {}))
    with reader.at("converter"):
        project.converter = _decode_converter(reader, data.get("converter", {}))
    with reader.at("load"):
        project.load = _decode_load(reader, data.get("load", {}))
    models = data.get("opamp_models", {})
    with reader.at("opamp_models"):
        if reader.mapping(models, tuple(models) if isinstance(models, dict) else ()) is not None:
            for name, model in models.items():
                with reader.at(name):
                    decoded = _decode_opamp(reader, model)
                    if decoded is not None:
                        project.opamp_models[name] = decoded
    for _, stage_data in reader.items(data, "stages"):
        stage = _decode_stage(reader, stage_data)
        if stage is not None:
            project.stages.append(stage)
    for _, measurement_data in reader.items(data, "measurements"):
        measurement = _decode_measurement(reader, measurement_data)
        if measurement is not None:
            project.measurements.append(measurement)
    for _, event_data in reader.items(data, "audit"):
        event = _decode_event(reader, event_data)
        if event is not None:
            project.audit.append(event)
    if not reader.problems:
        reader.problems.extend(_range_problems(project))
    if reader.problems:
        raise ProjectFileError(reader.problems, source)
    return project


# Every value the engine computes with lies within these magnitudes (0 where a field allows it).
# No part, amplifier, frequency or signal of a front-end comes near them (the value parser's
# prefixes span f … G), and within them no product or square of the engine overflows or
# underflows a double; past them (1e300 Ω, 1e-300 F) results turned to NaN and infinity.
MIN_MAGNITUDE = 1e-24
MAX_MAGNITUDE = 1e24


def _quantities(item: object, path: str) -> Iterator[tuple[str, Quantity]]:
    """(path, quantity) for every Quantity field of a model dataclass (pairs as path[0], path[1])."""
    for name in getattr(item, "__slots__", ()):
        value = getattr(item, name, None)
        if isinstance(value, Quantity):
            yield f"{path}.{name}" if path else name, value
        elif isinstance(value, tuple | list):
            for index, element in enumerate(value):
                if isinstance(element, Quantity):
                    yield f"{path}.{name}[{index}]" if path else f"{name}[{index}]", element
                elif isinstance(element, tuple):  # a complex root [f0_hz, Q]
                    for inner, quantity in enumerate(element):
                        if isinstance(quantity, Quantity):
                            yield f"{path}.{name}[{index}][{inner}]", quantity


def _range_problems(project: Project) -> list[str]:
    """A problem for every computed-with value outside MIN_MAGNITUDE … MAX_MAGNITUDE."""
    found: list[tuple[str, Quantity]] = []
    for path, section in (("settings", project.settings), ("input", project.input),
                          ("converter", project.converter), ("load", project.load)):
        found.extend(_quantities(section, path))
    for name, model in project.opamp_models.items():
        found.extend(_quantities(model, f"opamp_models.{name}"))
    for index, stage in enumerate(project.stages):
        found.extend(_quantities(stage, f"stages[{index}]"))  # gain, roots, zin, zout (checks are not computed with)
        for number, part in enumerate(stage.parts):
            found.extend(_quantities(part, f"stages[{index}].parts[{number}]"))
    problems = []
    for path, quantity in found:
        magnitude = abs(quantity.si)
        if magnitude != 0 and not MIN_MAGNITUDE <= magnitude <= MAX_MAGNITUDE:
            problems.append(f"{path}: {_describe(quantity.raw)} is beyond any real part or signal; Stagewise "
                            f"computes with magnitudes from {MIN_MAGNITUDE:g} to {MAX_MAGNITUDE:g}")
    return problems


def _decode_settings(reader: _Reader, data: object) -> Settings:
    settings = Settings()
    fields = reader.mapping(data, _SETTINGS_KEYS)
    if fields is None:
        return settings
    settings.f_min_hz = reader.field(fields, "f_min_hz", _positive, settings.f_min_hz)
    settings.f_max_hz = reader.field(fields, "f_max_hz", _positive, settings.f_max_hz)
    settings.points_per_decade = reader.field(fields, "points_per_decade", _integer, settings.points_per_decade)
    settings.temperature_c = reader.field(fields, "temperature_c", _quantity, settings.temperature_c)
    settings.ref_hz = reader.field(fields, "ref_hz", _optional_positive, None)
    band = reader.field(fields, "noise_band_hz", lambda v: None if v is None else _pair(_positive)(v), None)
    settings.noise_band_hz = band
    settings.seed = reader.field(fields, "seed", _integer, settings.seed)
    settings.mc_samples = reader.field(fields, "mc_samples", _integer, settings.mc_samples)
    settings.mc_distribution = reader.field(fields, "mc_distribution", _choice("uniform", "normal"),
                                            settings.mc_distribution)
    settings.temp_range_c = reader.field(fields, "temp_range_c",
                                         lambda v: None if v is None else _pair(_quantity)(v), None)
    settings.supply_variation_v = reader.field(fields, "supply_variation_v", _optional_nonnegative, None)
    settings.four_eyes = reader.field(fields, "four_eyes", _boolean, False)
    return settings


def _decode_input(reader: _Reader, data: object) -> InputDrive:
    drive = InputDrive()
    fields = reader.mapping(data, ("drive", "amplitude"))
    if fields is None:
        return drive
    drive.drive = reader.field(fields, "drive", _choice("voltage", "current"), drive.drive)
    drive.amplitude = reader.field(fields, "amplitude", _optional_positive, None)
    return drive


def _decode_converter(reader: _Reader, data: object) -> Converter:
    converter = Converter()
    fields = reader.mapping(data, ("fs_hz", "bits", "full_scale_vpp"))
    if fields is None:
        return converter
    converter.fs_hz = reader.field(fields, "fs_hz", _optional_positive, None)
    converter.bits = reader.field(fields, "bits", lambda v: None if v is None else _integer(v), None)
    converter.full_scale_vpp = reader.field(fields, "full_scale_vpp", _optional_positive, None)
    return converter


def _decode_load(reader: _Reader, data: object) -> Load:
    load = Load()
    fields = reader.mapping(data, ("r_ohm", "c_f"))
    if fields is None:
        return load
    load.r_ohm = reader.field(fields, "r_ohm", _optional_positive, None)
    load.c_f = reader.field(fields, "c_f", _optional_nonnegative, None)
    return load


def _decode_opamp(reader: _Reader, data: object) -> OpampModel | None:
    fields = reader.mapping(data, _OPAMP_KEYS, ("a0_db", "gbw_hz"))
    if fields is None or "a0_db" not in fields or "gbw_hz" not in fields:
        return None
    model = OpampModel(
        a0_db=reader.field(fields, "a0_db", _positive, Quantity(100, 100.0)),
        gbw_hz=reader.field(fields, "gbw_hz", _amplifier_frequency, Quantity(1, 1.0)),
    )
    model.description = reader.field(fields, "description", _text, "")
    model.p2_hz = reader.field(fields, "p2_hz", lambda v: None if v is None else _amplifier_frequency(v), None)
    for key in ("rin_ohm", "en_corner_hz", "in_corner_hz", "slew_v_per_s"):
        setattr(model, key, reader.field(fields, key, _optional_positive, None))
    for key in ("rout_ohm", "cin_diff_f", "cin_cm_f", "en_v_rthz", "in_a_rthz"):
        setattr(model, key, reader.field(fields, key, _optional_nonnegative, None))
    model.swing_v = reader.field(fields, "swing_v", lambda v: None if v is None else _pair(_quantity)(v), None)
    model.input_type = reader.field(fields, "input_type",
                                    lambda v: None if v is None else _choice(*INPUT_TYPES)(v), None)
    # Offset, drift and offset current are bounds of either sign; the bias current keeps its
    # sign (positive into the pins); CMRR and PSRR are positive ratios in dB.
    for key in ("vos_v", "vos_drift_v_per_c", "ios_a"):
        setattr(model, key, reader.field(fields, key, _optional_nonnegative, None))
    model.ib_a = reader.field(fields, "ib_a", _optional_quantity, None)
    for key in ("cmrr_db", "psrr_db"):
        setattr(model, key, reader.field(fields, key, _optional_positive, None))
    return model


def _decode_stage(reader: _Reader, data: object) -> Stage | None:
    fields = reader.mapping(data, _STAGE_KEYS, ("id", "name"))
    if fields is None:
        return None
    stage = Stage(id=reader.field(fields, "id", _name, ""), name=reader.field(fields, "name", _name, ""))
    stage.kind = reader.field(fields, "kind", _choice(CIRCUIT_KIND, BLOCK_KIND), CIRCUIT_KIND)
    stage.drive = reader.field(fields, "drive", _choice("voltage", "current"), "voltage")
    stage.bypass = reader.field(fields, "bypass", _boolean, False)
    stage.notes = reader.field(fields, "notes", _text, "")
    # Keys of the other kind are refused rather than silently ignored.
    foreign = (("ports", "parts") if stage.kind == BLOCK_KIND
               else ("gain", "zeros_hz", "poles_hz", "zin", "zout_ohm", "offset_v", "gain_error"))
    for key in foreign:
        if key in fields:
            with reader.at(key):
                reader.problem(f'a {stage.kind} stage takes no "{key}"; '
                               + ('ports and parts belong to kind "circuit"' if stage.kind == BLOCK_KIND
                                  else 'gain, zeros, poles, zin, zout, offset_v and gain_error belong to '
                                       'kind "block"'))
    if "ports" in fields:
        with reader.at("ports"):
            ports = reader.mapping(fields["ports"], ("in", "out"), ("in", "out"))
            if ports is not None:
                stage.ports = {
                    "in": reader.field(ports, "in", _name, "in"),
                    "out": reader.field(ports, "out", _name, "out"),
                }
    for _, part_data in reader.items(fields, "parts"):
        part = _decode_part(reader, part_data)
        if part is not None:
            stage.parts.append(part)
    stage.gain = reader.field(fields, "gain", _optional_quantity, None)
    for key in ("zeros_hz", "poles_hz"):
        roots = getattr(stage, key)
        for _, root in reader.items(fields, key):
            try:
                roots.append(_root(root))
            except ValueError as error:
                reader.problem(str(error))
    if "zin" in fields and fields["zin"] is not None:
        with reader.at("zin"):
            zin = reader.mapping(fields["zin"], ("r_ohm", "c_f"))
            if zin is not None:
                stage.zin_r_ohm = reader.field(zin, "r_ohm", _optional_positive, None)
                stage.zin_c_f = reader.field(zin, "c_f", _optional_nonnegative, None)
    stage.zout_ohm = reader.field(fields, "zout_ohm", _optional_nonnegative, None)
    stage.offset_v = reader.field(fields, "offset_v", _optional_nonnegative, None)
    stage.gain_error = reader.field(fields, "gain_error", _tolerance, None)
    for _, check_data in reader.items(fields, "checks"):
        check = _decode_check(reader, check_data)
        if check is not None:
            stage.checks.append(check)
    for _, signoff_data in reader.items(fields, "signoffs"):
        signoff_fields = reader.mapping(signoff_data, _SIGNOFF_KEYS, ("name", "verdict", "time", "fingerprint"))
        if signoff_fields is not None:
            stage.signoffs.append(Signoff(
                name=reader.field(signoff_fields, "name", _name, ""),
                role=reader.field(signoff_fields, "role", _text, ""),
                verdict=reader.field(signoff_fields, "verdict", _verdict, "rework"),
                time=reader.field(signoff_fields, "time", _text, ""),
                fingerprint=reader.field(signoff_fields, "fingerprint", _text, ""),
                note=reader.field(signoff_fields, "note", _text, ""),
            ))
    for _, comment_data in reader.items(fields, "comments"):
        comment_fields = reader.mapping(comment_data, _COMMENT_KEYS, ("author", "time", "text"))
        if comment_fields is not None:
            stage.comments.append(Comment(
                author=reader.field(comment_fields, "author", _name, ""),
                time=reader.field(comment_fields, "time", _text, ""),
                text=reader.field(comment_fields, "text", _text, ""),
                resolved=reader.field(comment_fields, "resolved", _boolean, False),
                check=reader.field(comment_fields, "check", _optional_text, None),
            ))
    return stage


def _decode_part(reader: _Reader, data: object) -> Part | None:
    fields = reader.mapping(data, _PART_KEYS, ("ref", "type", "nodes"))
    if fields is None:
        return None
    part = Part(
        ref=reader.field(fields, "ref", _name, ""),
        type=reader.field(fields, "type", _text, ""),
        nodes=reader.field(fields, "nodes", _nodes, []),
    )
    part.value = reader.field(fields, "value", _optional_quantity, None)
    part.tol = reader.field(fields, "tol", _tolerance, None)
    part.tc_ppm_per_c = reader.field(fields, "tc_ppm_per_c", _optional_nonnegative, None)
    part.control = reader.field(fields, "control", _optional_text, None)
    part.model = reader.field(fields, "model", _optional_text, None)
    return part


def _decode_check(reader: _Reader, data: object) -> Check | None:
    fields = reader.mapping(data, _CHECK_KEYS, ("id", "text"))
    if fields is None:
        return None
    check = Check(id=reader.field(fields, "id", _name, ""), text=reader.field(fields, "text", _text, ""))
    check.metric = reader.field(fields, "metric", _optional_text, None)
    check.where = reader.field(fields, "where", _choice("isolated", "in_chain", "from_input", "chain"), "in_chain")
    check.at_hz = reader.field(fields, "at_hz", _optional_positive, None)
    check.min = reader.field(fields, "min", _optional_quantity, None)
    check.max = reader.field(fields, "max", _optional_quantity, None)
    if fields.get("answer") is not None:
        with reader.at("answer"):
            answer = reader.mapping(fields["answer"], ("answer", "by", "time", "note"), ("answer", "by", "time"))
            if answer is not None:
                check.answer = ManualAnswer(
                    answer=reader.field(answer, "answer", _choice("yes", "no", "n/a"), "no"),
                    by=reader.field(answer, "by", _name, ""),
                    time=reader.field(answer, "time", _text, ""),
                    note=reader.field(answer, "note", _text, ""),
                )
    if fields.get("waiver") is not None:
        with reader.at("waiver"):
            waiver = reader.mapping(fields["waiver"], ("by", "role", "time", "justification"),
                                   ("by", "time", "justification"))
            if waiver is not None:
                check.waiver = Waiver(
                    by=reader.field(waiver, "by", _name, ""),
                    role=reader.field(waiver, "role", _text, ""),
                    time=reader.field(waiver, "time", _text, ""),
                    justification=reader.field(waiver, "justification", _name, ""),
                )
    return check


def _numbers(value: object) -> list[float]:
    if not isinstance(value, list):
        raise ValueError(f"expected a list of numbers, found {_describe(value)}")
    numbers: list[float] = []
    for index, item in enumerate(value):
        if isinstance(item, bool) or not isinstance(item, int | float):
            raise ValueError(f"item {index + 1} is {_describe(item)}, not a number")
        numbers.append(item)
    return numbers


def _decode_measurement(reader: _Reader, data: object) -> Measurement | None:
    fields = reader.mapping(data, _MEASUREMENT_KEYS, ("id", "kind", "where", "file", "sha256", "by", "time",
                                                      "fingerprint", "data"))
    if fields is None:
        return None
    measurement = Measurement(
        id=reader.field(fields, "id", _name, ""),
        kind=reader.field(fields, "kind", _choice("response", "step"), "response"),
        where=reader.field(fields, "where", _choice("isolated", "in_chain", "chain"), "chain"),
        stage=reader.field(fields, "stage", _optional_text, None),
        file=reader.field(fields, "file", _name, ""),
        sha256=reader.field(fields, "sha256", _text, ""),
        by=reader.field(fields, "by", _name, ""),
        time=reader.field(fields, "time", _text, ""),
        fingerprint=reader.field(fields, "fingerprint", _text, ""),
    )
    for key in ("source", "instrument", "setup", "note"):
        setattr(measurement, key, reader.field(fields, key, _text, ""))
    if "data" in fields:
        with reader.at("data"):
            columns = _MEASUREMENT_COLUMNS.get(measurement.kind, ())
            table = reader.mapping(fields["data"], columns, columns)
            if table is not None:
                for key in columns:
                    empty: list[float] = []
                    setattr(measurement, key, reader.field(table, key, _numbers, empty))
    return measurement


def _decode_event(reader: _Reader, data: object) -> AuditEvent | None:
    fields = reader.mapping(data, _EVENT_KEYS, _EVENT_KEYS)
    if fields is None:
        return None

    def detail(value: object) -> dict[str, Any]:
        if not isinstance(value, dict):
            raise ValueError(f"expected an object, found {_describe(value)}")
        return value

    return AuditEvent(
        seq=reader.field(fields, "seq", _integer, 0),
        time=reader.field(fields, "time", _text, ""),
        who=reader.field(fields, "who", _text, ""),
        what=reader.field(fields, "what", _text, ""),
        detail=reader.field(fields, "detail", detail, {}),
        prev=reader.field(fields, "prev", _text, ""),
        hash=reader.field(fields, "hash", _text, ""),
    )


# -- encode ----------------------------------------------------------------------------------


def _raw(quantity: Quantity | None) -> str | int | float | None:
    return None if quantity is None else quantity.raw


def encode(project: Project) -> dict[str, Any]:
    """The project as a JSON-ready dict with keys in the canonical order.

    Optional records that are empty (no sign-offs, no notes, not bypassed, ...) are left out, so
    that a minimal file stays minimal.
    """
    settings = project.settings
    settings_out: dict[str, Any] = {
        "f_min_hz": settings.f_min_hz.raw,
        "f_max_hz": settings.f_max_hz.raw,
        "points_per_decade": settings.points_per_decade,
        "temperature_c": settings.temperature_c.raw,
        "ref_hz": _raw(settings.ref_hz),
        "noise_band_hz": None if settings.noise_band_hz is None else [q.raw for q in settings.noise_band_hz],
        "seed": settings.seed,
    }
    if settings.mc_samples != Settings().mc_samples:
        settings_out["mc_samples"] = settings.mc_samples
    if settings.mc_distribution != Settings().mc_distribution:
        settings_out["mc_distribution"] = settings.mc_distribution
    if settings.temp_range_c is not None:
        settings_out["temp_range_c"] = [q.raw for q in settings.temp_range_c]
    if settings.supply_variation_v is not None:
        settings_out["supply_variation_v"] = settings.supply_variation_v.raw
    if settings.four_eyes:
        settings_out["four_eyes"] = True
    document: dict[str, Any] = {
        "format": FORMAT_NAME,
        "version": FORMAT_VERSION,
        "title": project.title,
        "revision": project.revision,
        "settings": settings_out,
        "input": {"drive": project.input.drive, "amplitude": _raw(project.input.amplitude)},
        "converter": {
            "fs_hz": _raw(project.converter.fs_hz),
            "bits": project.converter.bits,
            "full_scale_vpp": _raw(project.converter.full_scale_vpp),
        },
        "load": {"r_ohm": _raw(project.load.r_ohm), "c_f": _raw(project.load.c_f)},
        "opamp_models": {name: encode_opamp(model) for name, model in project.opamp_models.items()},
        "stages": [encode_stage(stage) for stage in project.stages],
    }
    if project.measurements:
        document["measurements"] = [encode_measurement(item) for item in project.measurements]
    document["audit"] = [encode_event(event) for event in project.audit]
    return document


def encode_opamp(model: OpampModel) -> dict[str, Any]:
    """An op-amp model as a JSON-ready dict (absent parameters left out)."""
    out: dict[str, Any] = {}
    if model.description:
        out["description"] = model.description
    for key in _OPAMP_KEYS[1:]:
        value = getattr(model, key)
        if value is None:
            continue
        if isinstance(value, str):  # input_type
            out[key] = value
        else:
            out[key] = [q.raw for q in value] if key == "swing_v" else value.raw
    return out


def _encode_root(root: Quantity | tuple[Quantity, Quantity]) -> Any:
    if isinstance(root, tuple):
        return [root[0].raw, root[1].raw]
    return root.raw


def encode_part(part: Part) -> dict[str, Any]:
    """A part as a JSON-ready dict (absent fields left out)."""
    out: dict[str, Any] = {"ref": part.ref, "type": part.type, "nodes": list(part.nodes)}
    if part.value is not None:
        out["value"] = part.value.raw
    if part.tol is not None:
        out["tol"] = part.tol.raw
    if part.tc_ppm_per_c is not None:
        out["tc_ppm_per_c"] = part.tc_ppm_per_c.raw
    if part.control is not None:
        out["control"] = part.control
    if part.model is not None:
        out["model"] = part.model
    return out


def encode_check(check: Check) -> dict[str, Any]:
    """A check as a JSON-ready dict (absent fields left out)."""
    out: dict[str, Any] = {"id": check.id, "text": check.text}
    if check.metric is not None:
        out["metric"] = check.metric
        out["where"] = check.where
        if check.at_hz is not None:
            out["at_hz"] = check.at_hz.raw
        if check.min is not None:
            out["min"] = check.min.raw
        if check.max is not None:
            out["max"] = check.max.raw
    if check.answer is not None:
        answer: dict[str, Any] = {"answer": check.answer.answer, "by": check.answer.by, "time": check.answer.time}
        if check.answer.note:
            answer["note"] = check.answer.note
        out["answer"] = answer
    if check.waiver is not None:
        waiver: dict[str, Any] = {"by": check.waiver.by}
        if check.waiver.role:
            waiver["role"] = check.waiver.role
        waiver["time"] = check.waiver.time
        waiver["justification"] = check.waiver.justification
        out["waiver"] = waiver
    return out


def encode_stage(stage: Stage) -> dict[str, Any]:
    """A stage as a JSON-ready dict in canonical key order."""
    out: dict[str, Any] = {"id": stage.id, "name": stage.name}
    if stage.kind != CIRCUIT_KIND:
        out["kind"] = stage.kind
    if stage.drive != "voltage" or not stage.is_block:
        out["drive"] = stage.drive
    if stage.bypass:
        out["bypass"] = True
    if stage.is_block:
        out["zeros_hz"] = [_encode_root(root) for root in stage.zeros_hz]
        out["poles_hz"] = [_encode_root(root) for root in stage.poles_hz]
        out["gain"] = _raw(stage.gain)
        out["zin"] = {"r_ohm": _raw(stage.zin_r_ohm), "c_f": _raw(stage.zin_c_f)}
        out["zout_ohm"] = _raw(stage.zout_ohm)
        if stage.offset_v is not None:
            out["offset_v"] = stage.offset_v.raw
        if stage.gain_error is not None:
            out["gain_error"] = stage.gain_error.raw
    else:
        out["ports"] = {"in": stage.ports["in"], "out": stage.ports["out"]}
        out["parts"] = [encode_part(part) for part in stage.parts]
    if not stage.is_block or stage.checks:
        out["checks"] = [encode_check(check) for check in stage.checks]
    if not stage.is_block or stage.signoffs:
        out["signoffs"] = [
            {"name": s.name, "role": s.role, "verdict": s.verdict, "note": s.note, "time": s.time,
             "fingerprint": s.fingerprint}
            for s in stage.signoffs
        ]
    if not stage.is_block or stage.comments:
        comments = []
        for comment in stage.comments:
            item: dict[str, Any] = {"author": comment.author, "time": comment.time, "text": comment.text}
            if comment.check is not None:
                item["check"] = comment.check
            item["resolved"] = comment.resolved
            comments.append(item)
        out["comments"] = comments
    if not stage.is_block or stage.notes:
        out["notes"] = stage.notes
    return out


def encode_measurement(measurement: Measurement) -> dict[str, Any]:
    """A measurement as a JSON-ready dict in canonical key order (empty texts left out)."""
    out: dict[str, Any] = {"id": measurement.id, "kind": measurement.kind, "where": measurement.where,
                           "stage": measurement.stage, "file": measurement.file, "sha256": measurement.sha256}
    if measurement.source:
        out["source"] = measurement.source
    out["by"] = measurement.by
    out["time"] = measurement.time
    for key in ("instrument", "setup", "note"):
        if getattr(measurement, key):
            out[key] = getattr(measurement, key)
    out["fingerprint"] = measurement.fingerprint
    out["data"] = {key: list(getattr(measurement, key)) for key in _MEASUREMENT_COLUMNS[measurement.kind]}
    return out


def encode_event(event: AuditEvent) -> dict[str, Any]:
    """An audit event as a JSON-ready dict (the key order that its hash is computed over)."""
    return {"seq": event.seq, "time": event.time, "who": event.who, "what": event.what,
            "detail": event.detail, "prev": event.prev, "hash": event.hash}


def dumps(project: Project) -> str:
    """The canonical file text: UTF-8 JSON, 2-space indent, keys in fixed order, final newline.

    Raises
    ------
    ValueError
        A number in the project is not finite (JSON has no such number; it is never written).
    """
    try:
        return json.dumps(encode(project), indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    except ValueError as error:
        raise ValueError(f"a number that is not finite (NaN or infinity) cannot be written to a project file "
                         f"({error})") from error
