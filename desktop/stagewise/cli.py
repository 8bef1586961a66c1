"""The command line (DESIGN section 6: a contract that tests and scripts rely on).

``stagewise [FILE]`` opens the desktop program; the subcommands run headless. Errors go to
stderr as one sentence, without a traceback, with exit status 2. Each subcommand lives in its
own module under :mod:`stagewise.commands` and is imported only when it runs, so that
``stagewise --help`` and the GUI start fast.
"""

from __future__ import annotations

import argparse
import importlib
import os
import re
import sys
from collections.abc import Sequence
from typing import Any, TextIO

from stagewise import __version__

__all__ = ["CommandError", "build_parser", "main", "printable"]

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_ERROR = 2

SUBCOMMANDS = ("gui", "analyze", "response", "check", "packet", "verify", "diff", "import-cards", "measure")


MEASURE_HELP = """\
Attach a bench measurement to a stage or to the whole chain.

DATA is a Touchstone 1.x two-port file (.s2p: S21 read as V_out/V_in; Z or Y parameters
converted to the open-output transfer) or a CSV file with a header row: frequency with magnitude
(dB or linear) and phase (deg or rad), or with real and imaginary parts, for a frequency
response; time and voltage for a step capture (time zero at the input edge). The points are
embedded in the project with the file's name and SHA-256; an audit event records the import.

Exit status: 0 attached (the project file is rewritten, its previous version kept as .bak);
2 the data or the project cannot be read, or the project is open for editing elsewhere
(nothing is changed).
"""


class CommandError(Exception):
    """An error to report as one sentence on stderr, exit status 2."""


# Characters a terminal may act on instead of showing: C0 controls, DEL, C1 controls (0x9b is
# a one-byte CSI), the bidirectional overrides and isolates (they reorder what is shown), and
# lone surrogates (not text at all; they cannot even be encoded for output).
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069\ud800-\udfff]")
_NAMED = {"\n": "\\n", "\r": "\\r", "\t": "\\t"}


def _escape(match: re.Match[str]) -> str:
    character = match.group()
    named = _NAMED.get(character)
    if named is not None:
        return named
    code = ord(character)
    return f"\\x{code:02x}" if code < 0x100 else f"\\u{code:04x}"


def printable(text: object) -> str:
    """``text`` safe to print: every control character escaped as Python writes it (``\\n``,
    ``\\x1b``, ``\\u202e``), so that text from a file (an id, a title, a check's text, a key
    name) can neither drive the terminal nor start a line of its own.

    Every command prints text that came from a file through this helper; the streams of
    :func:`main` escape whatever slips through (except line ends and tabs of our own layout).
    """
    return _CONTROL.sub(_escape, str(text))


# What the output streams escape: all of the above except the line ends and tabs our own
# printers lay out text with. Escaped as \uXXXX, which is also a valid escape inside a JSON
# string, so JSON output stays the same document.
_STREAM_CONTROL = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u200e\u200f\u202a-\u202e\u2066-\u2069"
                             "\ud800-\udfff]")


class _EscapingStream:
    """Wraps stdout or stderr for the duration of a command (see :func:`printable`)."""

    def __init__(self, stream: TextIO) -> None:
        self._stream = stream

    def write(self, text: str) -> int:
        self._stream.write(_STREAM_CONTROL.sub(lambda match: f"\\u{ord(match.group()):04x}", text))
        return len(text)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._stream, name)


class _Parser(argparse.ArgumentParser):
    """argparse that reports usage errors in one sentence with exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"stagewise: {message}; see 'stagewise --help'.\n")
        raise SystemExit(EXIT_ERROR)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand of DESIGN section 6."""
    parser = _Parser(
        prog="stagewise",
        description="Design review of analog signal chains. With no command, opens the desktop "
        "program on FILE (the bundled demo when no FILE is given).",
        epilog="Small-signal linear analysis only; it does not assess electrical safety. "
        "See the README's cautions.",
    )
    parser.add_argument("--version", action="version", version=f"stagewise {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    gui = commands.add_parser("gui", help="open the desktop program on FILE")
    gui.add_argument("file", metavar="FILE", nargs="?", help="project file (.stagewise.json)")
    gui.add_argument("--screenshot", metavar="PNG", help="render the main window offscreen to PNG and exit")
    gui.add_argument("--size", metavar="WxH", default="1440x900", help="window size for --screenshot (default 1440x900)")

    analyze = commands.add_parser("analyze", help="all metrics, per stage and for the chain")
    analyze.add_argument("file", metavar="FILE")
    analyze.add_argument("--json", action="store_true", help="print JSON (the only format for now)")

    response = commands.add_parser("response", help="frequency response at chosen frequencies")
    response.add_argument("file", metavar="FILE")
    response.add_argument("--stage", metavar="ID", help="one stage, isolated (default: the whole chain)")
    response.add_argument("--in-chain", action="store_true", help="with --stage: V_out/V_in where the stage sits")
    response.add_argument("--freqs", metavar="LIST", required=True, help="comma-separated frequencies, e.g. 10,1k,20k")
    response.add_argument("--json", action="store_true", help="print JSON")

    check = commands.add_parser("check", help="checklist status (exit 0 all met or waived, 1 otherwise)")
    check.add_argument("file", metavar="FILE")
    check.add_argument("--json", action="store_true", help="print JSON instead of a table")

    packet = commands.add_parser("packet", help="print the PDF review packet")
    packet.add_argument("file", metavar="FILE")
    packet.add_argument("-o", "--output", metavar="OUT.pdf", required=True)
    packet.add_argument("--by", metavar="NAME", help="who printed it (recorded in the audit trail)")

    verify = commands.add_parser("verify", help="audit-trail integrity (exit 0 intact, 1 broken)")
    verify.add_argument("file", metavar="FILE")

    diff = commands.add_parser("diff", help="what changed, part by part, and which sign-offs it puts out of date")
    diff.add_argument("old", metavar="OLD")
    diff.add_argument("new", metavar="NEW")

    cards = commands.add_parser("import-cards", help="append a stage built from element-card text")
    cards.add_argument("file", metavar="FILE")
    cards.add_argument("cards", metavar="CARDS", help="element-card text file, one part per line")
    cards.add_argument("--name", required=True, help="name of the new stage")
    cards.add_argument("--in", dest="in_node", metavar="NODE", default="in", help="input port node (default in)")
    cards.add_argument("--out", dest="out_node", metavar="NODE", default="out", help="output port node (default out)")
    cards.add_argument("--id", dest="stage_id", metavar="ID", help="id of the new stage (default: from the name)")
    cards.add_argument("--by", metavar="NAME", help="who imported it (recorded in the audit trail)")

    measure = commands.add_parser("measure", help="attach a bench measurement to a stage or the chain",
                                  description=MEASURE_HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    measure.add_argument("file", metavar="FILE")
    measure.add_argument("data", metavar="DATA", help="Touchstone .s2p or CSV measurement file")
    measure.add_argument("--stage", metavar="ID", help="the stage measured (isolated unless --in-chain)")
    measure.add_argument("--in-chain", action="store_true", help="with --stage: measured where it sits in the chain")
    measure.add_argument("--chain", action="store_true", help="the whole chain was measured, drive to last output")
    measure.add_argument("--by", metavar="NAME", help="who attached it (recorded in the audit trail)")
    measure.add_argument("--note", metavar="TEXT", help="a note kept with the measurement")
    measure.add_argument("--instrument", metavar="TEXT", help="the instrument used")
    measure.add_argument("--setup", metavar="TEXT", help="the set-up: probes, levels, bandwidth, averaging")
    measure.add_argument("--columns", metavar="LIST", help="CSV columns in order, e.g. f_khz,mag_db,phase_deg "
                         "(also f_hz, mag, phase_rad, re, im, t_s, t_ms, t_us, v, v_mv, - to skip)")
    measure.add_argument("--id", dest="measurement_id", metavar="ID", help="id of the measurement (default: from DATA)")
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    arguments = list(sys.argv[1:] if argv is None else argv)
    # `stagewise FILE` (no subcommand) opens the GUI on FILE.
    if arguments and not arguments[0].startswith("-") and arguments[0] not in SUBCOMMANDS:
        arguments = ["gui", *arguments]
    if not arguments:
        arguments = ["gui"]
    parser = build_parser()
    args = parser.parse_args(arguments)
    stdout, stderr = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = _EscapingStream(stdout), _EscapingStream(stderr)  # type: ignore[assignment]
    try:
        return _run(args)
    finally:
        sys.stdout, sys.stderr = stdout, stderr


def _run(args: argparse.Namespace) -> int:
    module_name = "stagewise.commands." + str(args.command).replace("-", "_")
    try:
        module = importlib.import_module(module_name)
        return int(module.run(args))
    except CommandError as error:
        _report(str(error))
        return EXIT_ERROR
    except ValueError as error:  # ProjectFileError, CircuitError, ValueSyntaxError
        _report(str(error))
        return EXIT_ERROR
    except OSError as error:
        where = f"{error.filename}: " if error.filename else ""
        _report(f"{where}{error.strerror or error}")
        return EXIT_ERROR
    except KeyboardInterrupt:
        _report("interrupted")
        return EXIT_ERROR
    except Exception as error:  # noqa: BLE001 - the user gets one sentence, never a traceback
        if os.environ.get("STAGEWISE_DEBUG"):
            raise
        _report(f"internal error ({type(error).__name__}: {error}); this is a fault in Stagewise, "
                "not in your file; run with STAGEWISE_DEBUG=1 to see where")
        return EXIT_ERROR


def _report(message: str) -> None:
    text = printable(" ".join(message.split()))
    if not text.endswith((".", "?", "!")):
        text += "."
    sys.stderr.write(f"stagewise: {text}\n")
