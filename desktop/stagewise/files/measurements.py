"""Bench measurements read from instrument files: frequency responses and step captures.

Two formats:

- **Touchstone 1.x** (``.s2p``; the open format network and impedance analysers write). The
  option line ``# <Hz|kHz|MHz|GHz> <S|Y|Z> <MA|DB|RI> R <ohms>`` (any order, defaults GHz, S,
  MA, R 50) says the frequency unit, the parameter, the number format and the reference
  resistance; ``!`` starts a comment. A two-port record is ``f N11 N21 N12 N22`` (Touchstone's
  own order), possibly wrapped over lines; noise parameters after the data (a record of five
  numbers whose frequency does not increase) are ignored. What Stagewise takes as the measured
  transfer, in the stage's own terms (V_out/V_in, or V_out/I_in for a current-driven stage):

  * ``S``: S21 as written, read as V_out/V_in. That is what gain-phase analysers and network
    analysers with high-impedance probes record; S21 of a 50 Ω measurement of a stage built for
    other source and load impedances is not that stage's transfer, and no conversion with the
    reference resistance is attempted.
  * ``Z``: port 2 open is the unloaded output: V_out/V_in = Z21/Z11 and V_out/I_in = Z21. In
    Touchstone 1.x, Z values are normalised to R, so they are multiplied by it.
  * ``Y``: inverted to Z (normalised to 1/R), then as Z.

  One-port files hold an impedance, not a transfer; they and files with more ports are refused.

- **CSV** (any other extension): one header row naming the columns, then numbers. Separators:
  comma, semicolon, tab or spaces; lines starting with ``#`` or ``!`` are comments. A frequency
  response has a frequency column and either magnitude (dB or linear) and phase (degrees or
  radians), or real and imaginary parts. A step capture has a time column and a voltage column.
  Columns are recognised from the header (``Frequency (kHz)``, ``Gain [dB]``, ``phase_deg``,
  ``Time (ms)``, ``CH1 (mV)``...), or given in order as canonical names (:data:`COLUMN_NAMES`,
  ``-`` for a column to skip), which also serves files without a header.

Every problem is one :class:`MeasurementError` sentence naming the file, the line and, where it
applies, the column (1-based). Nothing here is evaluated: numbers go through ``float`` on
strictly matched text only. A file over :data:`MAX_MEASUREMENT_BYTES` is refused from its size
alone, before a byte is read; anything but a regular file (a folder, a device, a pipe) is refused.
"""

from __future__ import annotations

import hashlib
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Final

import numpy as np
from numpy.typing import NDArray

from stagewise.files.input_files import InputFileError, read_regular_file

__all__ = [
    "COLUMN_NAMES",
    "MAX_MEASUREMENT_BYTES",
    "MAX_POINTS",
    "MeasurementData",
    "MeasurementError",
    "parse_measurement",
    "read_measurement",
]

MAX_MEASUREMENT_BYTES: Final = 8 * 1024 * 1024
# Network analysers sweep up to a few thousand points and oscilloscopes record more; the
# project file embeds the points, so a capture must be decimated below this first.
MAX_POINTS: Final = 20_000

_FREQUENCY_UNITS: Final = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}
_TIME_UNITS: Final = {"s": 1.0, "ms": 1e-3, "us": 1e-6, "µs": 1e-6, "μs": 1e-6, "ns": 1e-9}
_VOLTAGE_UNITS: Final = {"v": 1.0, "mv": 1e-3, "uv": 1e-6, "µv": 1e-6, "μv": 1e-6}

_SUFFIX_UNITS: Final = frozenset({*_FREQUENCY_UNITS, *_TIME_UNITS, *_VOLTAGE_UNITS, "db", "deg", "degree", "degrees",
                                   "rad", "radian", "radians", "lin", "linear"})

_UNIT_SPELLING: Final = {"hz": "Hz", "khz": "kHz", "mhz": "MHz", "ghz": "GHz", "us": "us", "v": "V", "mv": "mV",
                          "uv": "uV"}

# Canonical column names: quantity and unit in the name.
COLUMN_NAMES: Final = (
    "f_hz", "f_khz", "f_mhz", "f_ghz", "mag_db", "mag", "phase_deg", "phase_rad", "re", "im",
    "t_s", "t_ms", "t_us", "t_ns", "v", "v_mv", "v_uv", "-",
)

_NUMBER = re.compile(r"[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?")


class MeasurementError(ValueError):
    """A measurement file that cannot be used, as one sentence naming file, line and column."""


@dataclass(frozen=True, slots=True)
class MeasurementData:
    """What a measurement file holds, in SI units.

    ``kind`` is ``"response"`` (``f_hz`` and the complex ``response``, in the stage's own unit:
    V/V, or Ω for a current-driven stage) or ``"step"`` (``t_s`` and ``v``). ``source`` says in
    words what was read (format, parameter, units, columns); ``sha256`` is of the file's bytes.
    """

    kind: str
    file: str
    sha256: str
    source: str
    f_hz: NDArray[np.float64]
    response: NDArray[np.complex128]
    t_s: NDArray[np.float64]
    v: NDArray[np.float64]

    @property
    def points(self) -> int:
        return int(self.f_hz.size if self.kind == "response" else self.t_s.size)


def read_measurement(path: str | os.PathLike[str], *, drive: str = "voltage",
                     columns: str | None = None) -> MeasurementData:
    """Read a Touchstone (``.s2p``) or CSV measurement file.

    Parameters
    ----------
    path : path-like
        The file. Refused unread when it is not a regular file or is larger than
        :data:`MAX_MEASUREMENT_BYTES`.
    drive : {"voltage", "current"}
        The drive of the stage it is compared with: Touchstone Z/Y data then give V_out/V_in
        or V_out/I_in.
    columns : str, optional
        CSV only: comma-separated canonical column names (:data:`COLUMN_NAMES`) in file order.

    Raises
    ------
    MeasurementError
        One sentence naming the file, line and column.
    """
    name = os.fspath(path)
    try:
        data = read_regular_file(name, "a measurement file", "measurement files", MAX_MEASUREMENT_BYTES,
                                 f"{MAX_MEASUREMENT_BYTES // (1024 * 1024)} MiB")
    except InputFileError as error:
        raise MeasurementError(str(error)) from error
    return parse_measurement(data, Path(name).name, drive=drive, columns=columns)


def parse_measurement(data: bytes, file_name: str, *, drive: str = "voltage",
                      columns: str | None = None) -> MeasurementData:
    """Parse the bytes of a measurement file named ``file_name`` (the extension picks the format)."""
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError:
        try:
            text = data.decode("latin-1")  # Touchstone files are often ISO-8859-1
        except UnicodeDecodeError as error:  # pragma: no cover - latin-1 decodes every byte
            raise MeasurementError(f"{file_name}: not text") from error
    if "\x00" in text:
        raise MeasurementError(f"{file_name}: holds NUL bytes, so it is not a text measurement file")
    sha256 = hashlib.sha256(data).hexdigest()
    ports = re.fullmatch(r".*\.s(\d+)p", file_name.lower())
    if ports is not None:
        if columns:
            raise MeasurementError(f"{file_name}: a Touchstone file names its own columns; leave out the column list")
        return _touchstone(text, file_name, sha256, int(ports.group(1)), drive)
    return _csv(text, file_name, sha256, columns)


def _empty() -> NDArray[np.float64]:
    return np.zeros(0)


def _shown(text: str) -> str:
    """Text from the file as quoted in a message: at most 30 characters."""
    return text if len(text) <= 30 else text[:27] + "…"


def _number(token: str, file_name: str, line: int, column: int) -> float:
    if not _NUMBER.fullmatch(token):
        raise MeasurementError(f'{file_name}, line {line}, column {column}: "{_shown(token)}" is not a number'
                               " (units belong in the header, not in the data)")
    value = float(token)
    if not math.isfinite(value):
        raise MeasurementError(f'{file_name}, line {line}, column {column}: "{_shown(token)}" is out of range')
    return value


def _check_count(count: int, file_name: str, what: str) -> None:
    if count < 2:
        raise MeasurementError(f"{file_name}: {count} {what} found; a measurement needs at least two")
    if count > MAX_POINTS:
        raise MeasurementError(f"{file_name}: {count} {what} is more than {MAX_POINTS}; decimate the data first")


def _increasing(values: list[float], lines: list[int], file_name: str, column: int, what: str) -> None:
    for index in range(1, len(values)):
        if not values[index] > values[index - 1]:
            raise MeasurementError(
                f"{file_name}, line {lines[index]}, column {column}: {what} {values[index]:g} does not rise above "
                f"{values[index - 1]:g} on line {lines[index - 1]}; the {what} must increase from row to row")


# -- Touchstone 1.x --------------------------------------------------------------------------


def _touchstone(text: str, file_name: str, sha256: str, ports: int, drive: str) -> MeasurementData:
    if ports != 2:
        kind = "an impedance, not a transfer" if ports == 1 else f"{ports} ports"
        raise MeasurementError(f"{file_name}: a {ports}-port Touchstone file holds {kind}; give a two-port "
                               "(.s2p) file whose port 1 is the stage input and port 2 its output")
    unit, parameter, number_format, reference = "ghz", "S", "MA", 50.0
    option_seen = False
    noise_from: int | None = None
    records: list[tuple[list[float], int]] = []
    pending: list[tuple[float, int, int]] = []
    for line_number, raw in enumerate(text.splitlines(), start=1):
        line = raw.split("!", 1)[0].strip()
        if not line:
            continue
        if line.startswith("#"):
            if option_seen:
                continue  # Touchstone: options after the first line are ignored
            option_seen = True
            unit, parameter, number_format, reference = _option_line(line, file_name, line_number)
            continue
        if line.startswith("["):
            raise MeasurementError(f"{file_name}, line {line_number}: a Touchstone 2 keyword; "
                                   "Stagewise reads Touchstone 1.x files")
        tokens = line.split()
        if not pending and records and len(tokens) == 5:
            first = _number(tokens[0], file_name, line_number, 1)
            if first <= records[-1][0][0]:
                noise_from = line_number  # two-port noise parameters follow the data
                break
        for column, token in enumerate(tokens, start=1):
            pending.append((_number(token, file_name, line_number, column), line_number, column))
        while len(pending) >= 9:
            record, pending = pending[:9], pending[9:]
            records.append(([value for value, _, _ in record], record[0][1]))
    if pending:
        _, line_of_record, position = pending[0]
        raise MeasurementError(f"{file_name}, line {line_of_record}, column {position}: a two-port record needs 9 numbers "
                               f"(frequency and 4 pairs), this one has {len(pending)}")
    _check_count(len(records), file_name, "frequency points")
    scale = _FREQUENCY_UNITS[unit]
    f_hz = [record[0] * scale for record, _ in records]
    lines = [line for _, line in records]
    for index, frequency in enumerate(f_hz):
        if not frequency > 0:
            raise MeasurementError(f"{file_name}, line {lines[index]}, column 1: frequency {frequency:g} Hz must be "
                                   "greater than zero")
    _increasing(f_hz, lines, file_name, 1, "frequency")
    values = np.array([record[1:] for record, _ in records], dtype=float)
    pairs = _pairs(values, number_format, file_name, lines)  # (k, 4): N11 N21 N12 N22
    n11, n21, n12, n22 = pairs[:, 0], pairs[:, 1], pairs[:, 2], pairs[:, 3]
    current = drive == "current"
    if parameter == "S":
        if current:
            raise MeasurementError(f"{file_name}: S-parameters give a voltage ratio, but the stage is current-driven "
                                   "(V_out/I_in); export Z-parameters instead")
        response = n21
        taken = "S21 read as V_out/V_in"
    else:
        if parameter == "Z":
            z11, z21 = n11 * reference, n21 * reference
        else:
            y = np.stack([np.stack([n11, n12], -1), np.stack([n21, n22], -1)], -2) / reference
            determinant = np.linalg.det(y)
            bad = np.flatnonzero(determinant == 0)
            if bad.size:
                raise MeasurementError(f"{file_name}, line {lines[int(bad[0])]}: the Y matrix is singular, so it has "
                                       "no Z-parameters")
            z11, z21 = y[:, 1, 1] / determinant, -y[:, 1, 0] / determinant
        if current:
            response, taken = z21, f"{parameter} converted to Z21 = V_out/I_in"
        else:
            zero = np.flatnonzero(z11 == 0)
            if zero.size:
                raise MeasurementError(f"{file_name}, line {lines[int(zero[0])]}: Z11 is zero, so V_out/V_in = "
                                       "Z21/Z11 is undefined")
            response, taken = z21 / z11, f"{parameter} converted to V_out/V_in = Z21/Z11"
    source = (f"Touchstone 1.x two-port, {parameter}-parameters in {number_format}, frequency in "
              f"{ {'hz': 'Hz', 'khz': 'kHz', 'mhz': 'MHz', 'ghz': 'GHz'}[unit]}, R {reference:g} Ω; {taken}")
    if noise_from is not None:
        source += f"; noise parameters from line {noise_from} ignored"
    return MeasurementData("response", file_name, sha256, source, np.array(f_hz), np.asarray(response, dtype=complex),
                           _empty(), _empty())


def _option_line(line: str, file_name: str, line_number: int) -> tuple[str, str, str, float]:
    unit, parameter, number_format, reference = "ghz", "S", "MA", 50.0
    tokens = line[1:].split()
    index = 0
    while index < len(tokens):
        token = tokens[index]
        lower = token.lower()
        if lower in _FREQUENCY_UNITS:
            unit = lower
        elif lower in ("s", "y", "z"):
            parameter = lower.upper()
        elif lower in ("h", "g"):
            raise MeasurementError(f"{file_name}, line {line_number}: {token.upper()}-parameters are not read; "
                                   "export S, Z or Y")
        elif lower in ("ma", "db", "ri"):
            number_format = lower.upper()
        elif lower == "r":
            if index + 1 >= len(tokens):
                raise MeasurementError(f"{file_name}, line {line_number}: R needs the reference resistance after it")
            reference = _number(tokens[index + 1], file_name, line_number, index + 2)
            if not reference > 0:
                raise MeasurementError(f"{file_name}, line {line_number}: the reference resistance must be "
                                       "greater than zero")
            index += 1
        else:
            raise MeasurementError(f'{file_name}, line {line_number}: "{_shown(token)}" is not a Touchstone option; '
                                   "expected a frequency unit (Hz, kHz, MHz, GHz), S, Y or Z, MA, DB or RI, and R n")
        index += 1
    return unit, parameter, number_format, reference


def _pairs(values: NDArray[np.float64], number_format: str, file_name: str, lines: list[int]) -> NDArray[np.complex128]:
    first, second = values[:, 0::2], values[:, 1::2]
    if number_format == "RI":
        complex_values: NDArray[np.complex128] = first + 1j * second
        return complex_values
    magnitude: NDArray[np.float64]
    if number_format == "MA":
        negative = np.argwhere(first < 0)
        if negative.size:
            row, pair = int(negative[0][0]), int(negative[0][1])
            raise MeasurementError(f"{file_name}, line {lines[row]}: magnitude {first[row, pair]:g} of pair "
                                   f"{pair + 1} is negative; MA data give magnitudes")
        magnitude = first
    else:
        magnitude = 10.0 ** (first / 20.0)
    result: NDArray[np.complex128] = (magnitude * np.exp(1j * np.radians(second))).astype(np.complex128)
    return result


# -- CSV ---------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class _Column:
    quantity: str  # f, mag_db, mag, phase, re, im, t, v, skip
    scale: float   # to SI (Hz, s, V, rad for phase)


def _canonical(name: str) -> _Column | None:
    table = {
        "f_hz": ("f", 1.0), "f_khz": ("f", 1e3), "f_mhz": ("f", 1e6), "f_ghz": ("f", 1e9),
        "mag_db": ("mag_db", 1.0), "mag": ("mag", 1.0), "phase_deg": ("phase", math.pi / 180.0),
        "phase_rad": ("phase", 1.0), "re": ("re", 1.0), "im": ("im", 1.0),
        "t_s": ("t", 1.0), "t_ms": ("t", 1e-3), "t_us": ("t", 1e-6), "t_ns": ("t", 1e-9),
        "v": ("v", 1.0), "v_mv": ("v", 1e-3), "v_uv": ("v", 1e-6), "-": ("skip", 1.0),
    }
    entry = table.get(name.strip().lower())
    return None if entry is None else _Column(*entry)


_HEADER = re.compile(r"^\s*(?P<name>[^([]*?)\s*(?:[([]\s*(?P<unit>[^)\]]*?)\s*[)\]])?\s*$")


def _header_column(cell: str, file_name: str, line: int, column: int) -> _Column:
    canonical = _canonical(cell)
    if canonical is not None:
        return canonical
    match = _HEADER.match(cell)
    name = (match.group("name") if match else cell).strip().lower().strip('"')
    unit_text = (match.group("unit") or "") if match else ""
    unit = unit_text.strip().lower()
    where = f"{file_name}, line {line}, column {column}"

    def unit_of(table: dict[str, float], what: str, default: str | None) -> float:
        key = unit or (default or "")
        if key in table:
            return table[key]
        spellings = [_UNIT_SPELLING.get(name, name) for name in table if name.isascii()]
        accepted = ", ".join(spellings)
        if not unit:
            raise MeasurementError(f'{where}: the {what} column "{_shown(cell)}" names no unit; write it as '
                                   f'"{_shown(cell)} ({spellings[0]})" or with another of {accepted}')
        raise MeasurementError(f'{where}: "{_shown(unit_text)}" is not a {what} unit; use one of {accepted}')

    words = re.split(r"[\s_]+", name)
    first = words[0] if words else ""
    if not unit and len(words) > 1 and words[-1] in _SUFFIX_UNITS:
        # A unit written as the name's last word, as our own column names do (gain_db, time_us):
        # read it, or "gain_db" would pass as a linear magnitude.
        unit_text = words[-1]
        unit = unit_text
    if first in ("f", "freq", "frequency"):
        return _Column("f", unit_of(_FREQUENCY_UNITS, "frequency", None))
    if first in ("t", "time"):
        return _Column("t", unit_of(_TIME_UNITS, "time", None))
    if first in ("phase", "arg", "angle"):
        if unit in ("deg", "degree", "degrees", "°"):
            return _Column("phase", math.pi / 180.0)
        if unit in ("rad", "radian", "radians"):
            return _Column("phase", 1.0)
        raise MeasurementError(f'{where}: the phase column "{_shown(cell)}" needs its unit, deg or rad'
                               if not unit else f'{where}: "{_shown(unit_text)}" is not a phase unit; use deg or rad')
    if first in ("mag", "magnitude", "gain", "amplitude", "ratio"):
        if unit == "db":
            return _Column("mag_db", 1.0)
        if unit in ("", "v/v", "lin", "linear"):
            return _Column("mag", 1.0)
        raise MeasurementError(f'{where}: "{_shown(unit_text)}" is not a magnitude unit; use dB, V/V or none (linear)')
    if first in ("re", "real"):
        return _Column("re", 1.0)
    if first in ("im", "imag", "imaginary"):
        return _Column("im", 1.0)
    if first in ("v", "volt", "volts", "voltage", "ch1", "ch2", "ch3", "ch4", "out", "output", "vout"):
        return _Column("v", unit_of(_VOLTAGE_UNITS, "voltage", "v"))
    raise MeasurementError(f'{where}: "{_shown(cell)}" is not a column Stagewise knows; name it as frequency, magnitude, '
                           "gain, phase, real, imaginary, time or voltage with its unit, or give the column list")


def _split(line: str) -> list[str]:
    for separator in (";", "\t", ","):
        if separator in line:
            return [cell.strip() for cell in line.split(separator)]
    return line.split()


def _csv(text: str, file_name: str, sha256: str, columns: str | None) -> MeasurementData:
    rows: list[tuple[int, list[str]]] = []
    for line_number, raw in enumerate(text.splitlines(), start=1):
        line = raw.strip()
        if not line or line.startswith(("#", "!")):
            continue
        rows.append((line_number, _split(line)))
    if not rows:
        raise MeasurementError(f"{file_name}: holds no data")
    if columns:
        mapping: list[_Column] = []
        for index, name in enumerate(columns.split(","), start=1):
            column = _canonical(name)
            if column is None:
                raise MeasurementError(f'column list, entry {index}: "{name.strip()}" is not one of '
                                       f"{', '.join(COLUMN_NAMES)}")
            mapping.append(column)
        header_line, first_cells = rows[0]
        if first_cells and not _NUMBER.fullmatch(first_cells[0]):
            rows = rows[1:]  # a header is present; the given list overrides it
        names = columns
    else:
        header_line, cells = rows[0]
        if cells and _NUMBER.fullmatch(cells[0]):
            raise MeasurementError(f"{file_name}, line {header_line}: the first row holds numbers, not column names; "
                                   "add a header row or give the column list")
        mapping = [_header_column(cell, file_name, header_line, index) for index, cell in enumerate(cells, start=1)]
        rows = rows[1:]
        names = ", ".join(cells)
    quantities = [column.quantity for column in mapping]
    for quantity in set(quantities) - {"skip"}:
        if quantities.count(quantity) > 1:
            second = [index for index, item in enumerate(quantities, start=1) if item == quantity][1]
            raise MeasurementError(f"{file_name}, column {second}: a second {quantity} column; keep one "
                                   "(mark the other with - in the column list)")
    present = set(quantities)
    needed: tuple[str, ...]
    if "f" in present:
        kind = "response"
        if {"re", "im"} <= present:
            needed = ("f", "re", "im")
        elif {"mag_db", "phase"} <= present or {"mag", "phase"} <= present:
            needed = ("f", "mag_db" if "mag_db" in present else "mag", "phase")
        else:
            raise MeasurementError(f"{file_name}: a frequency response needs magnitude and phase, or real and "
                                   f"imaginary parts, beside the frequency; found the columns {names}")
    elif "t" in present:
        kind = "step"
        if "v" not in present:
            raise MeasurementError(f"{file_name}: a step capture needs a voltage column beside the time; "
                                   f"found the columns {names}")
        needed = ("t", "v")
    else:
        raise MeasurementError(f"{file_name}: no frequency or time column among {names}")
    positions = {quantity: quantities.index(quantity) for quantity in needed}
    _check_count(len(rows), file_name, "rows" if kind == "step" else "frequency points")
    values: dict[str, list[float]] = {quantity: [] for quantity in needed}
    lines: list[int] = []
    for line_number, cells in rows:
        if len(cells) != len(mapping):
            raise MeasurementError(f"{file_name}, line {line_number}: {len(cells)} columns where the header has "
                                   f"{len(mapping)}")
        for quantity, position in positions.items():
            value = _number(cells[position], file_name, line_number, position + 1)
            values[quantity].append(value * mapping[position].scale)
        lines.append(line_number)
    axis = "f" if kind == "response" else "t"
    axis_column = positions[axis] + 1
    if kind == "response":
        for index, frequency in enumerate(values["f"]):
            if not frequency > 0:
                raise MeasurementError(f"{file_name}, line {lines[index]}, column {axis_column}: frequency "
                                       f"{frequency:g} Hz must be greater than zero")
    _increasing(values[axis], lines, file_name, axis_column, "frequency" if kind == "response" else "time")
    source = f"CSV, columns {names}"
    if kind == "step":
        return MeasurementData("step", file_name, sha256, source, _empty(), np.zeros(0, dtype=complex),
                               np.array(values["t"]), np.array(values["v"]))
    if "re" in values:
        response = np.array(values["re"]) + 1j * np.array(values["im"])
    else:
        if "mag" in values:
            magnitude = np.array(values["mag"])
            negative = np.flatnonzero(magnitude < 0)
            if negative.size:
                row = int(negative[0])
                raise MeasurementError(f"{file_name}, line {lines[row]}, column {positions['mag'] + 1}: a linear "
                                       f"magnitude of {magnitude[row]:g} is negative")
        else:
            magnitude = 10.0 ** (np.array(values["mag_db"]) / 20.0)
        response = magnitude * np.exp(1j * np.array(values["phase"]))
    return MeasurementData("response", file_name, sha256, source, np.array(values["f"]),
                           np.asarray(response, dtype=complex), _empty(), _empty())
