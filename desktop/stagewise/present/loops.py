"""How a loop's margins read beside a loop-gain plot, in the program and in the packet."""

from __future__ import annotations

from stagewise.model.values import format_value

__all__ = ["loop_summary"]


def loop_summary(label: str, crossover_hz: float | None, phase_margin_deg: float | None,
                 gain_margin_db: float | None, why: str | None) -> str:
    """``"U1 alone: crossover 1.2 MHz, phase margin 62.0°, gain margin 14.3 dB"``, or the reason
    there is no crossover (``why``) beside the loop's label.

    The crossover is where |T| = 1 (0 dB); the phase margin is 180° + ∠T there; the gain margin
    is −20·log10|T| where ∠T = −180° (any control text, e.g. Ogata, *Modern Control Engineering*,
    ch. 7).
    """
    if crossover_hz is None:
        return f"{label}: {why or 'no crossover'}"
    text = f"{label}: crossover {format_value(crossover_hz, 'Hz')}"
    if phase_margin_deg is not None:
        text += f", phase margin {phase_margin_deg:.1f}°"
    if gain_margin_db is not None:
        text += f", gain margin {gain_margin_db:.1f} dB"
    return text
