"""The metric table (one source of names), its registration with the validator, and check templates."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from review_helpers import base_document, project_from

from stagewise.files.project_file import ProjectFileError
from stagewise.model.validate import KNOWN_METRICS_HOOK
from stagewise.review.metrics import METRICS, WHERE_VALUES, metric, metric_unit
from stagewise.review.templates import CheckTemplateError, check_templates
from stagewise.review.words import CHECK_STATE_MEANINGS, CheckState

# The metric keys DESIGN section 6 and the review brief name: the file format depends on them.
REQUIRED_KEYS = {
    "gain_db", "phase_deg", "peak_gain_db", "peaking_db", "f_low_3db_hz", "f_high_3db_hz", "attenuation_db",
    "group_delay_s", "rise_s", "overshoot_pct", "settle_1pct_s", "settle_01pct_s", "phase_margin_deg",
    "gain_margin_db", "crossover_hz", "loading_error_db_max", "zin_ohm", "zout_ohm", "noise_out_rms_v",
    "noise_in_rms", "snr_db", "alias_attenuation_db", "headroom_v", "slew_margin", "yield_pct",
    "measured_dev_db_max", "measured_dev_deg_max", "measured_inside_spread_pct",
    "measured_rise_s", "measured_overshoot_pct", "measured_settle_1pct_s",
    # The DC accuracy budget's contract (its keys are metrics usable in checks).
    "dc_gain", "gain_error_pct", "offset_out_v", "drift_out_v_per_c", "total_wc_v", "total_rss_v",
    "total_wc_lsb", "total_rss_lsb", "total_wc_pct_fs",
    "snr_noise_only_db", "converter_headroom_db", "swing_margin_v", "slew_margin_pct",
    # The signed loading error (in chain minus isolated, at the largest deviation).
    "loading_error_db",
}


def test_table_holds_exactly_the_documented_keys() -> None:
    assert set(METRICS) == REQUIRED_KEYS
    labels = [entry.label for entry in METRICS.values()]
    assert len(set(labels)) == len(labels)
    for entry in METRICS.values():
        assert entry.where and set(entry.where) <= set(WHERE_VALUES)
        assert entry.description.endswith(".")
    # SI units as the key suffixes promise (common practice, no source: units in names).
    for key, unit in (("_hz", "Hz"), ("_db", "dB"), ("_deg", "°"), ("_s", "s"), ("_pct", "%"), ("_ohm", "Ω"),
                      ("_v", "V")):
        for name, entry in METRICS.items():
            if name.endswith(key):
                assert entry.unit == unit, name
    assert metric_unit("noise_in_rms", "current") == "A"
    with pytest.raises(KeyError, match="not a metric"):
        metric("gain")


def test_every_state_has_a_meaning() -> None:
    assert set(CHECK_STATE_MEANINGS) == set(CheckState)
    assert [str(state) for state in CheckState] == ["met", "not met", "no value", "waived", "open", "n/a"]


def test_unknown_metric_fails_loading_with_its_path() -> None:
    assert KNOWN_METRICS_HOOK and KNOWN_METRICS_HOOK[0] == frozenset(METRICS)
    document = base_document()
    document["stages"][0]["checks"][0]["metric"] = "corner_hz"
    with pytest.raises(ProjectFileError, match=r'stages\[0\]\.checks\[0\]\.metric: "corner_hz" is not a metric'):
        project_from(document)


def test_templates_load_and_use_only_known_metrics() -> None:
    templates = check_templates()
    assert set(templates) == {"amplifier", "filter", "sensor_interface", "converter_driver", "bench"}
    for name, checks in templates.items():
        assert checks, name
        assert len({check.id for check in checks}) == len(checks)
        for check in checks:
            if check.metric is not None:
                assert check.metric in METRICS and check.where in METRICS[check.metric].where
                assert check.min is not None or check.max is not None
            assert check.answer is None and check.waiver is None
    # Source: common practice, no source — at least 45 degrees of phase margin (REFERENCES.md).
    assert templates["amplifier"][0].metric == "phase_margin_deg" and templates["amplifier"][0].min is not None
    assert templates["amplifier"][0].min.si == 45
    # Fresh objects each call: editing one stage's copy leaves the templates as they were.
    templates["filter"][0].text = "edited"
    assert check_templates()["filter"][0].text != "edited"


@pytest.mark.parametrize(("content", "message"), [
    ("{}", "list of checks"),
    ("[{\"id\": \"x\", \"text\": \"t\", \"metric\": \"nope\", \"max\": 1}]", "not a metric"),
    ("[{\"id\": \"x\", \"text\": \"t\", \"metric\": \"phase_deg\", \"max\": 1}]", "needs a frequency"),
    ("[{\"id\": \"x\", \"text\": \"t\", \"metric\": \"snr_db\", \"where\": \"isolated\", \"min\": 1}]", "not taken"),
    ("[{\"id\": \"x\", \"text\": \"t\", \"colour\": \"red\"}]", "unknown key"),
    ("[{\"id\": \"x\", \"text\": \"t\"}, {\"id\": \"x\", \"text\": \"u\"}]", "used twice"),
    ("[not json", "not valid JSON"),
])
def test_bad_templates_are_named(tmp_path: Path, content: str, message: str) -> None:
    (tmp_path / "broken.json").write_text(content, encoding="utf-8")
    with pytest.raises(CheckTemplateError, match=message) as caught:
        check_templates(tmp_path)
    assert "broken" in str(caught.value)


def test_resources_folder_can_be_overridden(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    (tmp_path / "checks").mkdir()
    (tmp_path / "checks" / "mine.json").write_text(json.dumps([{"id": "a", "text": "Asked?"}]), encoding="utf-8")
    monkeypatch.setenv("STAGEWISE_RESOURCES", str(tmp_path))
    assert list(check_templates()) == ["mine"]
