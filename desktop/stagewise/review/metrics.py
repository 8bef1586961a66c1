"""The table of metric keys that numeric checks name: one source for the GUI, the packet and the CLI.

Each metric has a key (as written in project files), the label and unit shown to users, whether
it is read at a frequency (``at_hz``), the places it can be taken (``isolated``: the stage alone,
ideally driven and unloaded; ``in_chain``: the stage where it sits, loaded by the next one;
``from_input``: the chain's drive to this stage's output, everything before it and after it in
place; ``chain``: the whole chain from its drive to its last output) and one line saying what it is.

Importing this module registers the key set with :data:`stagewise.model.validate.KNOWN_METRICS_HOOK`,
so that loading a file whose check names an unknown metric fails validation.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Final, Literal

from stagewise.model.validate import KNOWN_METRICS_HOOK, METRIC_UNITS_HOOK

__all__ = [
    "METRICS",
    "PASSBAND",
    "WHERE_VALUES",
    "Metric",
    "metric",
    "metric_unit",
    "register_known_metrics",
]

WHERE_VALUES: Final = ("isolated", "in_chain", "from_input", "chain")

AtHzRule = Literal["required", "reference", "unused"]

# What corners, peaking and attenuation are taken against (engine/metrics.py, passband_reference);
# every record of such a value names it as ``ref`` {kind, f_hz, gain_db}.
PASSBAND: Final = ("the pass-band gain: the DC gain of a low-pass shape, the high-frequency gain of a high-pass "
                   "shape, the mid-band gain of a band-pass shape (from the pole/zero model); ref_hz only where it "
                   "lies in a band-pass's flat mid-band or the shape has no pass-band gain of its own")

_ALL: Final = WHERE_VALUES
_STAGE: Final = ("isolated", "in_chain")
_CHAIN_ONLY: Final = ("chain",)


@dataclass(frozen=True, slots=True)
class Metric:
    """One metric a numeric check can name.

    ``at_hz`` says how a check's frequency is used: ``"required"`` (the check must give one),
    ``"reference"`` (optional; the project's ``settings.ref_hz`` when absent) or ``"unused"``.
    ``reference`` says what the value is taken against: :data:`PASSBAND` for corners, peaking
    and attenuation (their records carry ``ref``), else a few words (absolute values, the
    isolated stage for loading errors) or empty where the question does not arise.
    """

    key: str
    label: str
    unit: str
    at_hz: AtHzRule
    where: tuple[str, ...]
    description: str
    reference: str = ""

    @property
    def referenced(self) -> bool:
        """True when the value is taken against the response's pass-band reference (``ref``)."""
        return self.reference == PASSBAND

    @property
    def needs_hz(self) -> bool:
        """True when a check on this metric must name a frequency."""
        return self.at_hz == "required"


_TABLE: Final[tuple[Metric, ...]] = (
    Metric("gain_db", "Gain", "dB", "reference", _ALL,
           "Magnitude of the voltage (or transimpedance) gain at the frequency, in decibels.",
           "absolute, at at_hz (default settings.ref_hz)"),
    Metric("phase_deg", "Phase", "°", "required", _ALL,
           "Phase of the response at the frequency, unwrapped from the low end of the sweep."),
    Metric("peak_gain_db", "Peak gain", "dB", "unused", _ALL,
           "Largest gain anywhere in the analysed band.", "absolute (dB re 1 V/V, or dBΩ)"),
    Metric("peaking_db", "Peaking", "dB", "unused", _ALL,
           "How far the peak gain rises above the pass-band gain (0 dB when it does not).", PASSBAND),
    Metric("f_low_3db_hz", "Lower −3 dB corner", "Hz", "unused", _ALL,
           "Where the gain falls 3 dB below the pass-band gain, below the pass band.", PASSBAND),
    Metric("f_high_3db_hz", "Upper −3 dB corner", "Hz", "unused", _ALL,
           "Where the gain falls 3 dB below the pass-band gain, above the pass band.", PASSBAND),
    Metric("attenuation_db", "Attenuation", "dB", "required", _ALL,
           "Pass-band gain minus the gain at the frequency; positive when the signal is reduced.", PASSBAND),
    Metric("group_delay_s", "Group delay", "s", "required", _ALL,
           "Minus the derivative of phase with respect to angular frequency, at the frequency."),
    Metric("rise_s", "Rise time (10–90 %)", "s", "unused", _ALL,
           "Time the step response takes from 10 % to 90 % of its final value."),
    Metric("overshoot_pct", "Overshoot", "%", "unused", _ALL,
           "How far the step response rises past its final value, as a percentage of it."),
    Metric("settle_1pct_s", "Settling time (1 %)", "s", "unused", _ALL,
           "Time after which the step response stays within 1 % of its final value."),
    Metric("settle_01pct_s", "Settling time (0.1 %)", "s", "unused", _ALL,
           "Time after which the step response stays within 0.1 % of its final value."),
    Metric("phase_margin_deg", "Phase margin", "°", "unused", _STAGE,
           "Smallest phase margin among the loops of the stage's finite op-amps (over every unit-gain "
           "crossing, the distance of the loop gain to −1); no value when the closed loop is unstable."),
    Metric("gain_margin_db", "Gain margin", "dB", "unused", _STAGE,
           "Smallest gain margin among the loops of the stage's finite op-amps; no value when the closed "
           "loop is unstable."),
    Metric("crossover_hz", "Loop crossover", "Hz", "unused", _STAGE,
           "Frequency where the loop gain of the stage's op-amp falls through 0 dB (lowest if several)."),
    Metric("loading_error_db_max", "Largest loading error", "dB", "unused", ("in_chain",),
           "Largest difference over the band between the stage's gain in chain and isolated.",
           "the same stage isolated (in chain minus isolated)"),
    Metric("loading_error_db", "Loading error (signed)", "dB", "unused", ("in_chain",),
           "In chain minus isolated gain at the frequency where they differ most; negative when the next stage "
           "pulls the gain down (analyze --json gives the frequency as loading_error_f_hz).",
           "the same stage isolated (in chain minus isolated)"),
    Metric("zin_ohm", "Input impedance", "Ω", "reference", _STAGE,
           "Magnitude of the impedance seen into the stage's input (in chain: into the rest of the chain)."),
    Metric("zout_ohm", "Output impedance", "Ω", "reference", _STAGE,
           "Magnitude of the impedance seen back into the stage's output (in chain: with the chain before it)."),
    Metric("noise_out_rms_v", "Output noise (RMS)", "V", "unused", _CHAIN_ONLY,
           "Integrated noise at the chain's output over the project's noise band."),
    Metric("noise_in_rms", "Input-referred noise (RMS)", "V", "unused", _CHAIN_ONLY,
           "Output noise divided by the gain at the reference frequency; in amperes for a current drive."),
    Metric("snr_db", "Signal-to-noise ratio", "dB", "unused", _CHAIN_ONLY,
           "Converter full-scale sine (RMS) against the chain's output noise plus the converter's ideal "
           "quantization noise (LSB/√12), added as powers."),
    Metric("snr_noise_only_db", "Signal-to-noise ratio, chain noise only", "dB", "unused", _CHAIN_ONLY,
           "Converter full-scale sine (RMS) against the chain's output noise alone (no quantization noise)."),
    Metric("converter_headroom_db", "Converter headroom", "dB", "unused", _CHAIN_ONLY,
           "Converter full scale (peak) over the largest peak at its input for the declared input amplitude "
           "anywhere in the band; negative means over-range."),
    Metric("alias_attenuation_db", "Alias attenuation", "dB", "unused", _CHAIN_ONLY,
           "Attenuation of the chain at fs minus the upper pass-band edge, where signals fold into the band, "
           "below the chain's pass-band gain.", PASSBAND),
    Metric("headroom_v", "Smallest headroom", "V", "unused", ("in_chain", "chain"),
           "Smallest distance between an op-amp output's peak and its swing limit at the declared input "
           "(the same figure as the swing margin; older name)."),
    Metric("swing_margin_v", "Swing margin", "V", "unused", ("in_chain", "chain"),
           "Smallest distance between an op-amp output's peak and its swing limit at the declared input; "
           "negative means the output clips."),
    Metric("slew_margin", "Slew margin", "", "unused", ("in_chain", "chain"),
           "Smallest ratio of an op-amp's slew rate to the 2πf·V_peak its output needs across the band."),
    Metric("slew_margin_pct", "Slew margin (%)", "%", "unused", ("in_chain", "chain"),
           "How much faster the op-amp can slew than its output needs at the declared input, as a percentage "
           "of the need (smallest over the op-amps); negative means slew-limited."),
    Metric("yield_pct", "Yield over tolerances", "%", "unused", _CHAIN_ONLY,
           "Share of tolerance samples that meet every numeric check of the project the spread can "
           "evaluate per sample (the others are listed with the reason)."),
    # Bench measurements at the check's place (the worst of those attached there, none stale).
    Metric("measured_dev_db_max", "Largest measured gain deviation", "dB", "unused", _ALL,
           "Largest |measured − predicted| gain over the frequencies of the bench measurements taken there."),
    Metric("measured_dev_deg_max", "Largest measured phase deviation", "°", "unused", _ALL,
           "Largest |measured − predicted| phase over the frequencies of the bench measurements taken there."),
    Metric("measured_inside_spread_pct", "Measured points inside the predicted spread", "%", "unused", _ALL,
           "Share of measured frequencies where gain and phase lie within the Monte Carlo envelope of the "
           "prediction; 100 % means the board is within the predicted spread."),
    Metric("measured_rise_s", "Measured rise time", "s", "unused", _ALL,
           "Longest 10–90 % rise time of the step captures taken there, measured by the same code as the "
           "predicted step."),
    Metric("measured_overshoot_pct", "Measured overshoot", "%", "unused", _ALL,
           "Largest overshoot of the step captures taken there, above their final value."),
    Metric("measured_settle_1pct_s", "Measured settling time (1 %)", "s", "unused", _ALL,
           "Longest time the step captures taken there need to stay within 1 % of their final value."),
    # DC accuracy budget (engine/dc.py); values at the place's output.
    Metric("dc_gain", "DC gain", "V/V", "unused", _ALL,
           "Gain at 0 Hz with the op-amps' finite open-loop gain (Ω for a current drive)."),
    Metric("gain_error_pct", "DC gain error (worst case)", "%", "unused", _ALL,
           "Worst-case DC gain error at 25 °C: finite open-loop gain, part tolerances, CMRR, block gain errors."),
    Metric("offset_out_v", "Output offset (worst case)", "V", "unused", _ALL,
           "Worst-case DC offset at the output at 25 °C from offset voltages, bias and offset currents, supply "
           "variation and block offsets."),
    Metric("drift_out_v_per_c", "Output drift", "V/°C", "unused", _ALL,
           "Worst-case change of the output error over the temperature range, divided by its distance from 25 °C."),
    Metric("total_wc_v", "DC error (worst case)", "V", "unused", _ALL,
           "Every DC error source added by magnitude, over the temperature range, at the reference signal level."),
    Metric("total_rss_v", "DC error (RSS)", "V", "unused", _ALL,
           "Every DC error source added as the root-sum-square, over the temperature range."),
    Metric("total_wc_lsb", "DC error at the converter (worst case)", "LSB", "unused", _CHAIN_ONLY,
           "Worst-case DC error at the converter input in least significant bits (full scale / 2^bits)."),
    Metric("total_rss_lsb", "DC error at the converter (RSS)", "LSB", "unused", _CHAIN_ONLY,
           "Root-sum-square DC error at the converter input in least significant bits."),
    Metric("total_wc_pct_fs", "DC error at the converter (% of full scale)", "%", "unused", _CHAIN_ONLY,
           "Worst-case DC error at the converter input in percent of its full-scale span."),
)

METRICS: Final[dict[str, Metric]] = {entry.key: entry for entry in _TABLE}


def metric(key: str) -> Metric:
    """The table entry for ``key``.

    Raises
    ------
    KeyError
        With a sentence naming the unknown key.
    """
    try:
        return METRICS[key]
    except KeyError:
        raise KeyError(f'"{key}" is not a metric Stagewise computes') from None


def metric_unit(key: str, drive: str = "voltage") -> str:
    """The unit of ``key``'s value where the place's drive is ``drive``: input-referred noise is in
    amperes, and a gain is a transimpedance (Ω, dBΩ re 1 V/A) where the place is current-driven."""
    if key == "noise_in_rms" and drive == "current":
        return "A"
    if key == "dc_gain" and drive == "current":
        return "Ω"
    if key in ("gain_db", "peak_gain_db") and drive == "current":
        return "dBΩ"
    return metric(key).unit


def register_known_metrics() -> None:
    """Give the model's validator the key set (idempotent)."""
    keys = frozenset(METRICS)
    if KNOWN_METRICS_HOOK:
        KNOWN_METRICS_HOOK[0] = keys
    else:
        KNOWN_METRICS_HOOK.append(keys)
    units = {entry.key: entry.unit for entry in METRICS.values()}
    if METRIC_UNITS_HOOK:
        METRIC_UNITS_HOOK[0] = units
    else:
        METRIC_UNITS_HOOK.append(units)


register_known_metrics()
