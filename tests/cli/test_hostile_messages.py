"""Messages for hostile and extreme files: one sentence with the file and JSON path, no Python
internals, no numpy warnings; values beyond any real part are refused before the engine sees them."""

from __future__ import annotations

import json
import os
import subprocess
import sys
import warnings
from pathlib import Path
from typing import Any

import pytest

from stagewise.cli import main
from stagewise.files.project_file import loads_project

GREENHOUSE = Path(__file__).resolve().parents[2] / "projects" / "greenhouse.stagewise.json"


def _one_sentence(err: str) -> str:
    assert err.endswith("\n") and err.count("\n") == 1, f"not one line: {err!r}"
    assert err.startswith("stagewise: ") and "Traceback" not in err and "internal error" not in err
    return err


def _demo() -> dict[str, Any]:
    document: dict[str, Any] = json.loads(GREENHOUSE.read_text(encoding="utf-8"))
    return document


def _write(tmp_path: Path, document: dict[str, Any]) -> Path:
    path = tmp_path / "extreme.stagewise.json"
    path.write_text(json.dumps(document, indent=2) + "\n", encoding="utf-8")
    return path


# Common practice, no source (value from memory): the fastest op-amps sold reach a few tens of
# GHz of gain-bandwidth; 1e300 Hz describes no amplifier.
def test_an_unphysical_gain_bandwidth_is_refused_with_its_path(tmp_path: Path,
                                                                capsys: pytest.CaptureFixture[str]) -> None:
    document = _demo()
    name = next(iter(document["opamp_models"]))
    document["opamp_models"][name]["gbw_hz"] = 1e300
    status = main(["analyze", str(_write(tmp_path, document)), "--json"])
    err = _one_sentence(capsys.readouterr().err)
    assert status == 2 and f"opamp_models.{name}.gbw_hz: 1e+300 Hz is beyond any amplifier" in err
    assert "NaN" not in err and "math domain" not in err


@pytest.mark.parametrize(("where", "value"), [
    (("stages", 1, "parts", 1, "value"), 1e300),
    (("stages", 1, "parts", 2, "value"), 1e-300),
    (("opamp_models", 0, "en_v_rthz"), 1e300),
    (("opamp_models", 0, "rout_ohm"), 1e300),
    (("load", "c_f"), 1e-30),
])  # fmt: skip
def test_values_beyond_any_real_part_are_refused_with_their_path(tmp_path: Path, where: tuple[Any, ...],
                                                                  value: float,
                                                                  capsys: pytest.CaptureFixture[str]) -> None:
    document = _demo()
    node: Any = document
    path = ""
    for piece in where[:-1]:
        if node is document["opamp_models"]:
            piece = list(node)[piece]
        node = node.setdefault(piece, {}) if isinstance(node, dict) else node[piece]
        path += f"[{piece}]" if isinstance(piece, int) else (f".{piece}" if path else piece)
    node[where[-1]] = value
    path += f".{where[-1]}"
    status = main(["check", str(_write(tmp_path, document))])
    err = _one_sentence(capsys.readouterr().err)
    assert status == 2 and f"{path}: {value!r} is beyond any real part or signal" in err


def _at_the_bounds() -> list[dict[str, Any]]:
    documents = []
    for mutate in (
        lambda d: d["stages"][1]["parts"][1].__setitem__("value", 1e24),
        lambda d: d["stages"][1]["parts"][2].__setitem__("value", 1e-24),
        lambda d: [model.__setitem__("gbw_hz", 1e12) for model in d["opamp_models"].values()],
        lambda d: [model.__setitem__("rout_ohm", 1e24) for model in d["opamp_models"].values()],
        lambda d: d["stages"][3]["parts"][0].__setitem__("value", 1e-24),
    ):
        document = _demo()
        mutate(document)
        documents.append(document)
    return documents


# Common practice, no source: a warning printed by a library is noise to the user; a value
# that cannot be computed is null with its reason instead.
@pytest.mark.parametrize("index", range(5))
def test_values_at_the_bounds_compute_without_floating_point_warnings(index: int) -> None:
    from stagewise.engine.analysis import ProjectAnalysis
    from stagewise.review.checks import evaluate_project

    project = loads_project(json.dumps(_at_the_bounds()[index]), "bounds.stagewise.json")
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        analysis = ProjectAnalysis(project)
        json.dumps(analysis.document(), allow_nan=False)
        evaluate_project(project, analysis)


def test_no_warning_reaches_stderr_of_the_command_line(tmp_path: Path) -> None:
    path = _write(tmp_path, _at_the_bounds()[3])
    environment = {**os.environ, "STAGEWISE_DEBUG": ""}
    for command in (["analyze", str(path), "--json"], ["check", str(path)]):
        finished = subprocess.run([sys.executable, "-m", "stagewise", *command], capture_output=True, text=True,
                                  env=environment, timeout=300, check=False)
        assert finished.returncode in (0, 1), finished.stderr
        assert finished.stderr == ""


def test_response_on_a_singular_stage_is_null_with_the_reason_and_the_file(tmp_path: Path,
                                                                          capsys: pytest.CaptureFixture[str]) -> None:
    # Source: DESIGN section 6 and `response --help`: where the response is undefined, points is
    # null with why beside it, exit 1. A source forcing v(out) = v(out) leaves v(out) undetermined.
    document = {"format": "stagewise-project", "version": 1, "title": "Singular",
                "stages": [{"id": "loop", "name": "Loop", "ports": {"in": "in", "out": "out"},
                            "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "out"], "value": "1k"},
                                      {"ref": "E1", "type": "vcvs", "nodes": ["out", "0", "out", "0"],
                                       "value": 1}]}]}
    path = _write(tmp_path, document)
    for extra in ([], ["--stage", "loop"], ["--stage", "loop", "--in-chain"]):
        status = main(["response", str(path), *extra, "--freqs", "1k", "--json"])
        captured = capsys.readouterr()
        assert status == 1 and captured.err == ""
        result = json.loads(captured.out)
        assert result["points"] is None and str(path) in result["why"]


def test_an_op_amp_without_feedback_says_no_loop_not_a_math_error(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    # Common practice, no source: an op-amp whose output reaches neither input has no loop gain,
    # so it has no phase margin; that is a reason, not a "math domain error".
    document = {"format": "stagewise-project", "version": 1, "title": "Open loop",
                "opamp_models": {"amp": {"a0_db": 96, "gbw_hz": "3M"}},
                "stages": [{"id": "open", "name": "Open loop", "ports": {"in": "in", "out": "out"},
                            "parts": [{"ref": "R1", "type": "R", "nodes": ["in", "p"], "value": "2k2"},
                                      {"ref": "R2", "type": "R", "nodes": ["p", "0"], "value": "22k"},
                                      {"ref": "U1", "type": "opamp", "nodes": ["p", "0", "out"], "model": "amp"}],
                            "checks": [{"id": "pm", "text": "Phase margin", "metric": "phase_margin_deg",
                                        "where": "isolated", "min": 45}]}]}
    path = _write(tmp_path, document)
    status = main(["check", str(path)])
    captured = capsys.readouterr()
    assert status == 1 and "math domain" not in captured.out + captured.err
    assert "no loop" in captured.out


def test_a_long_ladder_computes_without_floating_point_warnings() -> None:
    # Common practice, no source: an RC ladder's response falls by up to 20 dB per decade per section above its
    # corners, so 100 sections reach far below the smallest double at the top of the band.
    from stagewise.engine.analysis import ProjectAnalysis

    parts = []
    for index in range(100):
        a = "in" if index == 0 else f"n{index}"
        b = "out" if index == 99 else f"n{index + 1}"
        parts.append({"ref": f"R{index + 1}", "type": "R", "nodes": [a, b], "value": "1k", "tol": "1%"})
        parts.append({"ref": f"C{index + 1}", "type": "C", "nodes": [b, "0"], "value": "10n", "tol": "5%"})
    document = {"format": "stagewise-project", "version": 1, "title": "Long ladder",
                "stages": [{"id": "ladder", "name": "Ladder", "ports": {"in": "in", "out": "out"}, "parts": parts}]}
    project = loads_project(json.dumps(document), "ladder.stagewise.json")
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        json.dumps(ProjectAnalysis(project).document(), allow_nan=False)
