"""Small projects of our own for the review tests (values chosen for these tests only)."""

from __future__ import annotations

import copy
import json
from typing import Any

from stagewise.files.project_file import loads_project
from stagewise.model.project import Project

# A first-order RC low-pass (R1 in series, C1 to node 0) followed by a unity buffer on a finite
# op-amp model, and a manual check. Component values are our own.
BASE_DOCUMENT: dict[str, Any] = {
    "format": "stagewise-project",
    "version": 1,
    "title": "Review test chain",
    "revision": "A",
    "settings": {"f_min_hz": 1, "f_max_hz": 1e6, "points_per_decade": 50, "temperature_c": 25,
                 "ref_hz": 100, "noise_band_hz": [10, 20000], "seed": 3},
    "input": {"drive": "voltage", "amplitude": "50m"},
    "converter": {"fs_hz": 48000, "bits": 16, "full_scale_vpp": 4},
    "load": {"r_ohm": None, "c_f": None},
    "opamp_models": {"test-5M": {"a0_db": 100, "gbw_hz": "5M", "rout_ohm": 40},
                     "unused-1M": {"a0_db": 90, "gbw_hz": "1M"}},
    "stages": [
        {"id": "rc", "name": "RC low-pass", "drive": "voltage",
         "ports": {"in": "in", "out": "out"},
         "parts": [
             {"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "3k3", "tol": "1%"},
             {"ref": "C1", "type": "C", "nodes": ["out", "0"], "value": "4n7", "tol": "5%"},
         ],
         "checks": [
             {"id": "corner", "text": "Corner above 9 kHz", "metric": "f_high_3db_hz", "where": "isolated",
              "min": "9k"},
             {"id": "flat", "text": "Flat at 100 Hz", "metric": "gain_db", "where": "isolated",
              "at_hz": 100, "min": -0.05, "max": 0.05},
             {"id": "layout", "text": "Is C1 placed next to the connector?"},
         ],
         "signoffs": [], "comments": [], "notes": "anti-RF corner"},
        {"id": "buf", "name": "Buffer", "drive": "voltage",
         "ports": {"in": "in", "out": "out"},
         "parts": [
             {"ref": "R2", "type": "R", "nodes": ["in", "0"], "value": "100k"},
             {"ref": "U1", "type": "opamp", "nodes": ["in", "out", "out"], "model": "test-5M"},
         ],
         "checks": [
             {"id": "pm", "text": "Phase margin at least 50 degrees", "metric": "phase_margin_deg",
              "where": "isolated", "min": 50},
         ],
         "signoffs": [], "comments": [], "notes": ""},
    ],
    "audit": [],
}


def base_document() -> dict[str, Any]:
    return copy.deepcopy(BASE_DOCUMENT)


def project_from(document: dict[str, Any]) -> Project:
    return loads_project(json.dumps(document))


def base_project() -> Project:
    return project_from(base_document())
