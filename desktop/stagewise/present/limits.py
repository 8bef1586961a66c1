"""Where check limits are drawn on the response and step plots: one answer for the program and the packet.

A shape is ``(plot, label, x_range, y_range)``: ``plot`` is ``"magnitude"``, ``"phase"`` or
``"step"``; ranges are in the plot's data units (hertz, dB, degrees, seconds) and an open side is
±inf. A range of zero height (``y_low == y_high``) is a level the trace must stay on one side of
(a peaking limit); anything else is a gate the trace passes through.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from stagewise.model.project import Check, Project

__all__ = ["LimitShape", "PLACE_WORDS", "limit_shapes", "peaking_level", "peaking_reference_db"]

LimitShape = tuple[str, str, tuple[float, float], tuple[float, float]]

# Where a check is taken, as the plot labels say it (short: the label sits inside the plot).
PLACE_WORDS: dict[str, str] = {"isolated": "alone", "in_chain": "in chain", "from_input": "from the chain input",
                               "chain": "whole chain"}


def limit_shapes(check: Check, project: Project) -> list[LimitShape]:
    """Where a numeric check's limits are drawn (see the module's docstring for the shapes).

    Metrics that are not a point or band on one of those plots (noise totals, margins, yield,
    ...) are not drawn; peaking needs the pass-band reference and is :func:`peaking_level`.
    """
    if check.metric is None or (check.min is None and check.max is None):
        return []
    low = -math.inf if check.min is None else check.min.si
    high = math.inf if check.max is None else check.max.si
    where = PLACE_WORDS.get(check.where, check.where)
    at_hz = check.at_hz.si if check.at_hz is not None else (
        project.settings.ref_hz.si if project.settings.ref_hz is not None else None)
    label = f"{check.id} ({where})"
    if check.metric in ("gain_db", "phase_deg") and at_hz is not None:
        plot = "magnitude" if check.metric == "gain_db" else "phase"
        # A narrow gate around the frequency: the trace must pass through it.
        return [(plot, label, (at_hz / 1.12, at_hz * 1.12), (low, high))]
    if check.metric in ("f_low_3db_hz", "f_high_3db_hz", "crossover_hz"):
        return [("magnitude", label, (low, high), (-math.inf, math.inf))]
    if check.metric == "peak_gain_db":
        return [("magnitude", label, (-math.inf, math.inf), (low, high))]
    if check.metric in ("rise_s", "settle_1pct_s", "settle_01pct_s"):
        return [("step", label, (low if math.isfinite(low) else 0.0, high), (-math.inf, math.inf))]
    return []


def peaking_reference_db(metrics: Mapping[str, Any] | None) -> float | None:
    """The pass-band reference gain (dB) behind a place's peaking: peak gain − peaking.

    ``metrics`` is one place's metrics as ``analyze --json`` prints them (``peak_gain_db`` and
    ``peaking_db``); ``None`` where either is missing.
    """
    if not metrics:
        return None
    peak, peaking = metrics.get("peak_gain_db"), metrics.get("peaking_db")
    if not isinstance(peak, (int, float)) or not isinstance(peaking, (int, float)):
        return None
    return float(peak) - float(peaking)


def peaking_level(check: Check, reference_db: float | None) -> LimitShape | None:
    """A peaking check's maximum as a level across the band: reference + the allowed peaking.

    Peaking is the peak gain over the pass-band reference (engine/metrics.py), so the trace must
    not rise above that level anywhere. ``None`` for another metric, a check without a maximum
    or a place without a reference.
    """
    if check.metric != "peaking_db" or check.max is None or reference_db is None:
        return None
    level = reference_db + check.max.si
    where = PLACE_WORDS.get(check.where, "")
    return ("magnitude", f"{check.id} ({where}): peak ≤ {level:.2f} dB", (-math.inf, math.inf), (level, level))
