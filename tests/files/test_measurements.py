"""Reading bench measurements: Touchstone 1.x against scikit-rf, CSV, and bad files refused."""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest

from stagewise.files.measurements import MAX_MEASUREMENT_BYTES, MeasurementError, parse_measurement, read_measurement

skrf = pytest.importorskip("skrf")

# A band-pass-like response of our own: H(s) = K·s·ω2 / ((s + ω1)(s + ω2)), f1 = 40 Hz, f2 = 25 kHz, K = 8.
F_HZ = np.logspace(0, 6, 121)


def _response(f_hz: np.ndarray) -> np.ndarray:
    s = 2j * np.pi * f_hz
    w1, w2 = 2 * np.pi * 40.0, 2 * np.pi * 25e3
    return 8.0 * s * w2 / ((s + w1) * (s + w2))


def _network(response: np.ndarray, f_hz: np.ndarray = F_HZ) -> object:
    s = np.empty((f_hz.size, 2, 2), dtype=complex)
    s[:, 0, 0] = 0.2 - 0.1j
    s[:, 0, 1] = 1e-3 + 2e-3j
    s[:, 1, 1] = 0.3 + 0.05j
    s[:, 1, 0] = response
    return skrf.Network(frequency=skrf.Frequency.from_f(f_hz, unit="hz"), s=s, z0=50, name="board")


@pytest.mark.parametrize("form", ["db", "ma", "ri"])
def test_touchstone_s21_written_by_scikit_rf_reads_back_exactly(tmp_path: Path, form: str) -> None:
    path = tmp_path / "board.s2p"
    network = _network(_response(F_HZ))
    # Reference library: scikit-rf 2.x, Network.write_touchstone (Touchstone 1.0 writer).
    network.write_touchstone(filename=str(path), form=form)
    data = read_measurement(path)
    assert data.kind == "response"
    assert data.points == F_HZ.size
    np.testing.assert_allclose(data.f_hz, F_HZ, rtol=1e-12)
    np.testing.assert_allclose(data.response, _response(F_HZ), rtol=1e-12)
    # Reference library: scikit-rf 2.x, Network(file) reads the same file to the same S21.
    reread = skrf.Network(str(path))
    np.testing.assert_allclose(data.response, reread.s[:, 1, 0], rtol=1e-12)


@pytest.mark.parametrize("parameter", ["Z", "Y"])
def test_touchstone_z_and_y_give_the_open_output_transfer(tmp_path: Path, parameter: str) -> None:
    path = tmp_path / "board.s2p"
    network = _network(0.5 * _response(F_HZ) / 8.0)
    network.write_touchstone(filename=str(path), form="ri", parameter=parameter)
    voltage = read_measurement(path, drive="voltage")
    current = read_measurement(path, drive="current")
    # Reference library: scikit-rf 2.x, Network.z (S -> Z with the reference impedance). With port 2
    # open, V2/V1 = Z21/Z11 and V2/I1 = Z21 (Source: two-port impedance parameters, any circuits text).
    z = network.z
    np.testing.assert_allclose(voltage.response, z[:, 1, 0] / z[:, 0, 0], rtol=1e-9)
    np.testing.assert_allclose(current.response, z[:, 1, 0], rtol=1e-9)


def test_touchstone_option_line_defaults_and_units() -> None:
    # Touchstone 1.x defaults: GHz, S, MA, R 50 (Source: Touchstone File Format Specification 1.1, option line).
    text = "! no option line\n1 0 0 0.5 -90 0 0 0 0\n2 0 0 0.25 -180 0 0 0 0\n"
    data = parse_measurement(text.encode(), "x.s2p")
    np.testing.assert_allclose(data.f_hz, [1e9, 2e9])
    np.testing.assert_allclose(data.response, [-0.5j, -0.25], atol=1e-15)
    # A record wrapped over two lines, and noise parameters after the data, are both Touchstone 1.x.
    text = "# kHz S RI R 50\n1 0 0 0.5\n 0 0 0 0 0\n2 0 0 0.25 0 0 0 0 0\n1 2.5 0.3 10 0.2\n"
    data = parse_measurement(text.encode(), "x.s2p")
    np.testing.assert_allclose(data.f_hz, [1e3, 2e3])
    assert "noise parameters" in data.source


def test_csv_round_trip_in_every_column_form(tmp_path: Path) -> None:
    response = _response(F_HZ)
    mag_db, phase_deg = 20 * np.log10(np.abs(response)), np.degrees(np.angle(response))
    forms = {
        "Frequency (kHz),Gain (dB),Phase (deg)": np.column_stack([F_HZ / 1e3, mag_db, phase_deg]),
        "f_hz;mag;phase_rad": np.column_stack([F_HZ, np.abs(response), np.angle(response)]),
        "freq [Hz]\tReal\tImag": np.column_stack([F_HZ, response.real, response.imag]),
    }
    for header, table in forms.items():
        separator = ";" if ";" in header else ("\t" if "\t" in header else ",")
        lines = [header] + [separator.join(repr(float(value)) for value in row) for row in table]
        path = tmp_path / "sweep.csv"
        path.write_text("\n".join(lines) + "\n", encoding="utf-8")
        data = read_measurement(path)
        np.testing.assert_allclose(data.f_hz, F_HZ, rtol=1e-12, err_msg=header)
        np.testing.assert_allclose(data.response, response, rtol=1e-12, err_msg=header)


def test_csv_column_list_for_a_file_without_header() -> None:
    text = "0.1 0 0 9\n0.2 -1 -5 9\n"
    data = parse_measurement(text.encode(), "scope.txt", columns="f_khz,mag_db,phase_deg,-")
    np.testing.assert_allclose(data.f_hz, [100.0, 200.0])
    # Common practice, no source: -1 dB is a magnitude of 10^(-1/20).
    assert abs(abs(data.response[1]) - 10 ** (-1 / 20)) < 1e-15


def test_step_capture_with_units_from_the_header() -> None:
    text = "Time (us),CH1 (mV)\n-1,0\n0,0\n1,500\n2,1000\n"
    data = parse_measurement(text.encode(), "step.csv")
    assert data.kind == "step"
    np.testing.assert_allclose(data.t_s, [-1e-6, 0, 1e-6, 2e-6])
    np.testing.assert_allclose(data.v, [0, 0, 0.5, 1.0])


def test_a_unit_written_as_the_last_word_of_a_column_name_is_read() -> None:
    # Common practice, no source: "gain_db" is a gain in decibels and "freq_khz" a frequency in
    # kilohertz, as instrument exports and our own column names write them; -6 dB is a magnitude
    # of 10^(-6/20), not a negative linear magnitude.
    text = "freq_khz,gain_db,phase_deg\n0.1,0,-1\n1,-6,-9\n"
    data = parse_measurement(text.encode(), "export.csv")
    np.testing.assert_allclose(data.f_hz, [100.0, 1000.0])
    assert abs(abs(data.response[1]) - 10 ** (-6 / 20)) < 1e-15
    assert abs(np.angle(data.response[1], deg=True) + 9) < 1e-12
    step = parse_measurement(b"time_us,ch1_mv\n0,0\n1,500\n", "step.csv")
    np.testing.assert_allclose(step.t_s, [0, 1e-6])
    np.testing.assert_allclose(step.v, [0, 0.5])


# -- bad files: one sentence each, naming file, line and column --------------------------------

BAD_FILES = {
    "wrong unit": ("a.csv", "Frequency (rpm),Gain (dB),Phase (deg)\n1,0,0\n2,0,0\n",
                   r'a\.csv, line 1, column 1: "rpm" is not a frequency unit'),
    "wrong phase unit": ("a.csv", "f (Hz),Gain (dB),Phase (grad)\n1,0,0\n2,0,0\n",
                         r'a\.csv, line 1, column 3: "grad" is not a phase unit'),
    "non-monotonic": ("a.csv", "f_hz,mag_db,phase_deg\n10,0,0\n20,0,0\n15,0,0\n",
                      r"a\.csv, line 4, column 1: frequency 15 does not rise above 20 on line 3"),
    "missing column": ("a.csv", "f_hz,mag_db\n10,0\n20,0\n",
                       r"a\.csv: a frequency response needs magnitude and phase"),
    "text in numbers": ("a.csv", "f_hz,mag_db,phase_deg\n10,0,0\n20,-3dB,0\n",
                        r'a\.csv, line 3, column 2: "-3dB" is not a number'),
    "ragged row": ("a.csv", "f_hz,mag_db,phase_deg\n10,0,0\n20,0\n", r"a\.csv, line 3: 2 columns where the header has 3"),
    "no step voltage": ("s.csv", "Time (s),Temp (C)\n0,1\n1,2\n", r's\.csv, line 1, column 2: "Temp \(C\)" is not'),
    "touchstone bad unit": ("b.s2p", "# rpm S MA\n1 0 0 1 0 0 0 0 0\n",
                            r'b\.s2p, line 1: "rpm" is not a Touchstone option'),
    "touchstone short record": ("b.s2p", "# Hz S MA\n1 0 0 1 0 0 0 0 0\n2 0 0 1 0\n",
                                r"b\.s2p, line 3, column 1: a two-port record needs 9 numbers"),
    "touchstone non-monotonic": ("b.s2p", "# Hz S MA\n1 0 0 1 0 0 0 0 0\n3 0 0 1 0 0 0 0 0\n2 0 0 1 0 0 0 0 0\n",
                                 r"b\.s2p, line 4, column 1: frequency 2 does not rise above 3"),
    "touchstone text": ("b.s2p", "# Hz S MA\n1 0 0 1 0 0 0 0 0\n2 0 0 one 0 0 0 0 0\n",
                        r'b\.s2p, line 3, column 4: "one" is not a number'),
    "touchstone one-port": ("b.s1p", "# Hz Z RI\n1 50 0\n2 50 0\n", r"b\.s1p: a 1-port Touchstone file holds an impedance"),
    "touchstone negative magnitude": ("b.s2p", "# Hz S MA\n1 0 0 -1 0 0 0 0 0\n2 0 0 1 0 0 0 0 0\n",
                                      r"b\.s2p, line 2: magnitude -1 of pair 2 is negative"),
}  # fmt: skip


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_bad_file_gives_one_sentence_naming_where(tmp_path: Path, case: str) -> None:
    name, text, pattern = BAD_FILES[case]
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    with pytest.raises(MeasurementError, match=pattern) as caught:
        read_measurement(path)
    assert "\n" not in str(caught.value)


def test_a_one_gigabyte_file_is_refused_by_its_size_unread(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "huge.csv"
    with open(path, "wb") as handle:
        handle.truncate(1024 ** 3)  # sparse: no disk space used
    opened: list[str] = []
    real_open = open

    def watching_open(file: object, *args: object, **kwargs: object) -> object:
        opened.append(str(file))
        return real_open(file, *args, **kwargs)  # type: ignore[call-overload]

    monkeypatch.setattr("builtins.open", watching_open)
    with pytest.raises(MeasurementError, match=r"1,073,741,824 bytes; measurement files over 8 MiB are refused"):
        read_measurement(path)
    assert str(path) not in opened
    assert MAX_MEASUREMENT_BYTES < 1024 ** 3


def test_folders_and_pipes_are_refused(tmp_path: Path) -> None:
    with pytest.raises(MeasurementError, match="this is a folder"):
        read_measurement(tmp_path)
    fifo = tmp_path / "pipe.csv"
    os.mkfifo(fifo)
    with pytest.raises(MeasurementError, match="not a regular file"):
        read_measurement(fifo)
    with pytest.raises(MeasurementError, match="no such file"):
        read_measurement(tmp_path / "absent.csv")


# Common practice, no source: a reader of outside files fails only with its own one-sentence error.
from hypothesis import given, settings  # noqa: E402
from hypothesis import strategies as st  # noqa: E402

_CELLS = st.sampled_from(["1", "2.5", "-3", "1e3", "nan", "inf", "x", "", "1,2", "10 kHz", "0", "1e999", "#",
                          "!", "Frequency (Hz)", "Gain (dB)", "Phase (deg)", "Time (s)", "V", "R", "50", "MA", "DB"])


@settings(max_examples=300, deadline=None)
@given(rows=st.lists(st.lists(_CELLS, min_size=1, max_size=9), min_size=0, max_size=12),
       separator=st.sampled_from([",", ";", "\t", " "]), name=st.sampled_from(["a.csv", "a.s2p", "a.s1p", "a.txt"]),
       columns=st.one_of(st.none(), st.sampled_from(["f_hz,mag_db,phase_deg", "t_s,v", "f_khz,re,im,-", "bogus"])))
def test_any_text_reads_or_fails_with_one_sentence(rows: list[list[str]], separator: str, name: str,
                                                   columns: str | None) -> None:
    text = "\n".join(separator.join(row) for row in rows)
    if name.endswith(".s2p") and rows:
        text = "# Hz S MA R 50\n" + text
    try:
        data = parse_measurement(text.encode(), name, columns=None if name.endswith("p") else columns)
    except MeasurementError as error:
        assert "\n" not in str(error) and str(error).startswith(("a.", "column list"))
        return
    axis = data.f_hz if data.kind == "response" else data.t_s
    assert axis.size >= 2 and np.all(np.diff(axis) > 0) and np.all(np.isfinite(axis))
    values = data.response if data.kind == "response" else data.v
    assert values.size == axis.size and np.all(np.isfinite(values))


@settings(max_examples=200, deadline=None)
@given(st.binary(max_size=400), st.sampled_from(["b.csv", "b.s2p"]))
def test_any_bytes_read_or_fail_with_one_sentence(data: bytes, name: str) -> None:
    try:
        parse_measurement(data, name)
    except MeasurementError as error:
        assert "\n" not in str(error)
