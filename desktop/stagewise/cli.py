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
import textwrap
import warnings
from collections.abc import Sequence
from typing import Any, TextIO

from stagewise import __version__

__all__ = ["CommandError", "build_parser", "main", "printable"]

EXIT_OK = 0
EXIT_FAILED = 1
EXIT_ERROR = 2

SUBCOMMANDS = ("gui", "analyze", "response", "check", "packet", "verify", "diff", "merge", "sign", "import-cards",
               "measure")


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


_EXITS_READ = "exit status: 0 done; 2 the file cannot be read or an option is wrong (one sentence on stderr)."

CARD_SYNTAX = """\
element cards: one part per line, in the netlist line form of the trade
  R|C|L<ref>  node node value          resistor, capacitor, inductor
  E<ref>  out+ out- in+ in- gain       voltage-controlled voltage source
  G<ref>  out+ out- in+ in- siemens    voltage-controlled current source
  U<ref>  in+ in- out model            op-amp: "ideal" or a model of the project
  * comment line      ; comment (also after a card)      .end (optional, ends the deck)
node 0 is the common reference. Values: a number, an optional scale factor and an optional unit,
case-insensitive: T 1e12, G 1e9, MEG 1e6, K 1e3, M 1e-3 (M is MILLI in cards), U or µ 1e-6,
N 1e-9, P 1e-12, F 1e-15 (femto). 4k7 and 2R2 (IEC 60062) are read too; 1M5 is refused as
ambiguous. Values are stored in the project file's own notation (1M in a card becomes 1m).

example (cards.txt):
  * input RC and a follower
  R1  in   a    10K      ; series resistor
  C1  a    0    4.7N
  Rb  a    0    1MEG     ; bias, one megohm
  U1  a    out  out  ideal

  stagewise import-cards chain.stagewise.json cards.txt --name "Input RC" --in in --out out --after sensor
"""


def _command(commands: argparse._SubParsersAction,  # type: ignore[type-arg]
             name: str, summary: str, writes: str, exits: str) -> argparse.ArgumentParser:
    """A subcommand whose --help says what it does, what it writes and its exit statuses."""
    return commands.add_parser(  # type: ignore[no-any-return]
        name, help=summary, description=f"{summary[0].upper()}{summary[1:]}.",
        epilog=_wrapped(f"writes: {writes}", exits), formatter_class=argparse.RawDescriptionHelpFormatter)


def _wrapped(*paragraphs: str) -> str:
    return "\n".join(textwrap.fill(paragraph, 96, subsequent_indent="  ") for paragraph in paragraphs)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand of DESIGN section 6."""
    parser = _Parser(
        prog="stagewise",
        description="Design review of analog signal chains. With no command, opens the desktop "
        "program on FILE (the bundled demo when no FILE is given).",
        epilog="Every command: exit status 2 and one sentence on stderr when a file cannot be read or an "
        "option is wrong; 'stagewise COMMAND --help' gives each command's output and exit statuses. "
        "Small-signal linear analysis only; it does not assess electrical safety. See the README's cautions.",
    )
    parser.add_argument("--version", action="version", version=f"stagewise {__version__}")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    gui = _command(commands, "gui", "open the desktop program on FILE",
                   "nothing on its own; with --screenshot, the PNG (and its size on stdout)",
                   "exit status: 0 closed normally or screenshot written; 2 no display, a file that cannot be "
                   "read, or a screenshot that could not be made.")
    gui.add_argument("file", metavar="FILE", nargs="?", help="project file (.stagewise.json)")
    gui.add_argument("--screenshot", metavar="PNG", help="render the main window offscreen to PNG and exit")
    gui.add_argument("--size", metavar="WxH", default="1440x900",
                     help="window size for --screenshot (default 1440x900); a window cannot be smaller than its "
                     "contents allow, and the size written is printed")

    analyze = _command(commands, "analyze", "all metrics, per stage and for the chain",
                       "a JSON document on stdout (DESIGN section 6: stages with isolated and in-chain metrics, "
                       "the chain with noise, converter figures and spread); nothing is written to files",
                       _EXITS_READ)
    analyze.add_argument("file", metavar="FILE")
    analyze.add_argument("--json", action="store_true", help="print JSON (the only format for now)")

    response = _command(commands, "response", "frequency response at chosen frequencies",
                        "a table on stdout (frequency, magnitude in dB, phase in degrees, real and imaginary "
                        "parts), or with --json {\"what\", \"unit\", \"points\": [{\"f_hz\", \"re\", \"im\", "
                        "\"mag_db\", \"phase_deg\"}], \"stability\": {\"verdict\", \"why\", \"poles\"}}; "
                        "the table warns under its title when the system shown is unstable",
                        "exit status: 0 printed; 1 the response is undefined (the reason is printed); "
                        "2 the file cannot be read or an option is wrong.")
    response.add_argument("file", metavar="FILE")
    response.add_argument("--stage", metavar="ID", help="one stage, isolated (default: the whole chain)")
    response.add_argument("--in-chain", action="store_true", help="with --stage: V_out/V_in where the stage sits")
    response.add_argument("--from-input", action="store_true",
                          help="with --stage: the chain's drive to this stage's output (V/V, or Ω for a current "
                          "drive)")
    response.add_argument("--freqs", metavar="LIST", required=True, help="comma-separated frequencies, e.g. 10,1k,20k")
    response.add_argument("--json", action="store_true", help="print JSON instead of a table")

    check = _command(commands, "check", "checklist status (exit 0 all met or waived, 1 otherwise)",
                     "a table on stdout (stage, check, state, value, limits, metric, text), the reasons, the "
                     "automatic findings (an unstable stage or chain, converter over-range, an op-amp output "
                     "that clips or is slew-limited), the totals and each stage's sign-off state (a sign-off no audit event holds shows as "
                     "unrecorded), then any acceptance that breaks the project's four-eyes rule and any review "
                     "record that does not match its audit event; or JSON with --json",
                     "exit status: 0 every check met, waived or not applicable; 1 any check not met, without "
                     "a value or open, any automatic finding, an acceptance that breaks the four-eyes rule, or a review record written, "
                     "edited or removed outside the program; 2 the file cannot be read.")
    check.add_argument("file", metavar="FILE")
    check.add_argument("--json", action="store_true", help="print JSON instead of a table")

    packet = _command(commands, "packet", "print the PDF review packet",
                      "the PDF review packet into OUT.pdf (cover with the file's SHA-256 and totals, cautions, "
                      "chain plots and tables, a section per stage, the audit trail), replaced whole when complete; "
                      "then a 'review packet printed' event naming the PDF's SHA-256 is appended to FILE's audit "
                      "trail and FILE is saved (the previous version kept as FILE.bak); one line on stdout",
                      "exit status: 0 written and recorded; 2 the file cannot be read, OUT.pdf cannot be "
                      "written, or FILE could not be saved (then the PDF exists but is not recorded).")
    packet.add_argument("file", metavar="FILE")
    packet.add_argument("-o", "--output", metavar="OUT.pdf", required=True, help="the PDF to write")
    packet.add_argument("--by", metavar="NAME", help="who printed it (recorded in the audit trail)")

    verify = _command(commands, "verify", "audit-trail integrity (exit 0 intact, 1 broken)",
                      "one line on stdout per finding: the chain's verdict, then every review record without "
                      "an audit event; nothing is written to files",
                      "exit status: 0 intact; 1 broken, or a record without its event; 2 the file cannot be read.")
    verify.add_argument("file", metavar="FILE")

    diff = _command(commands, "diff", "what changed and what it does to the review",
                    "on stdout: one line per part and setting change (values as typed, old → new), every check "
                    "whose state moves (old → new, with values), the sign-offs the changes put out of date, and "
                    "the review records added and removed; with --json {\"parts\", \"settings\", \"models\", "
                    "\"stages\", \"checks\" (old_state, new_state, old_value, new_value), \"signoffs_stale\", "
                    "\"records_added\", \"records_removed\"}; nothing is written to files",
                    "exit status: 0 no differences; 1 differences; 2 a file cannot be read.")
    diff.add_argument("old", metavar="OLD")
    diff.add_argument("new", metavar="NEW")
    diff.add_argument("--json", action="store_true", help="print JSON instead of lines")

    merge = _command(commands, "merge", "merge two edited copies of one project (usable as a git merge driver)",
                     "OUT, written atomically, only when the copies merge: design edits part by part, review "
                     "records by identity, both audit trails kept with a 'merge' event naming both heads; "
                     "one line on stdout. On conflicts nothing is written and each conflict is printed on "
                     "stderr with its JSON path and both values. As a git merge driver: "
                     "stagewise merge %O %A %B -o %A",
                     "exit status: 0 merged; 1 conflicts (OUT not written); 2 an input cannot be read, or OUT is open "
                     "for editing elsewhere (OUT not written).")
    merge.add_argument("base", metavar="BASE", help="the common ancestor")
    merge.add_argument("ours", metavar="OURS", help="our copy")
    merge.add_argument("theirs", metavar="THEIRS", help="their copy")
    merge.add_argument("-o", "--output", metavar="OUT", required=True, help="where to write the merged project")
    merge.add_argument("--by", metavar="NAME", help="who merges (recorded in the merge event; default the login name)")

    from stagewise.review.words import VERDICT_WORDS, VERDICTS

    sign = _command(commands, "sign", "record a reviewer's verdict on a stage",
                    "FILE, saved with the sign-off (bound to the stage's current fingerprint) and its audit event "
                    "(the previous version kept as FILE.bak); one line on stdout",
                    "exit status: 0 recorded; 2 the project cannot be read, the stage or verdict is wrong, the "
                    "four-eyes rule forbids it, or FILE is open for editing elsewhere (FILE is then unchanged).")
    sign.add_argument("file", metavar="FILE")
    sign.add_argument("--stage", metavar="ID", required=True, help="the stage signed")
    sign.add_argument("--verdict", required=True, choices=VERDICTS,
                      help=f"{VERDICTS[0]} ({VERDICT_WORDS[VERDICTS[0]]}) or {VERDICTS[1]} "
                      f"({VERDICT_WORDS[VERDICTS[1]]}, needs --note)")
    sign.add_argument("--note", metavar="TEXT", help="what was reviewed, or what must change")
    sign.add_argument("--by", metavar="NAME", help="the reviewer (default: the login name)")
    sign.add_argument("--role", metavar="ROLE", help="the reviewer's role, e.g. 'analog design reviewer'")

    cards = commands.add_parser(
        "import-cards", help="add a stage built from element-card text",
        description="Add a stage built from element-card text to FILE: at the end of the chain, or after "
        "(or before) the stage given.",
        epilog=CARD_SYNTAX + "\n" + _wrapped(
            "writes: FILE, saved with the new stage and an 'import' event in its audit trail (the previous "
            "version kept as FILE.bak); one line on stdout, and a note for every value read with M as milli.",
            "exit status: 0 imported; 2 a card or the project cannot be read, or FILE is open for editing "
            "elsewhere (FILE is then left unchanged)."),
        formatter_class=argparse.RawDescriptionHelpFormatter)
    cards.add_argument("file", metavar="FILE")
    cards.add_argument("cards", metavar="CARDS", help="element-card text file, one part per line")
    cards.add_argument("--name", required=True, help="name of the new stage")
    cards.add_argument("--in", dest="in_node", metavar="NODE", default="in", help="input port node (default in)")
    cards.add_argument("--out", dest="out_node", metavar="NODE", default="out", help="output port node (default out)")
    cards.add_argument("--id", dest="stage_id", metavar="ID", help="id of the new stage (default: from the name)")
    place = cards.add_mutually_exclusive_group()
    place.add_argument("--after", metavar="ID", help="put the new stage right after stage ID (default: at the end)")
    place.add_argument("--before", metavar="ID", help="put the new stage right before stage ID")
    cards.add_argument("--by", metavar="NAME", help="who imported it (recorded in the audit trail)")

    measure = commands.add_parser(
        "measure", help="attach a bench measurement to a stage or the chain", description=MEASURE_HELP,
        epilog=_wrapped("writes: FILE, saved with the measurement and a 'measurement' event in its audit trail "
                        "(the previous version kept as FILE.bak); one line on stdout.",
                        "exit status: 0 attached; 2 the project or DATA cannot be read, or FILE is open for "
                        "editing elsewhere (FILE is then left unchanged)."),
        formatter_class=argparse.RawDescriptionHelpFormatter)
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
        with warnings.catch_warnings():
            # Last resort: the loader refuses values that overflow the engine (files.codec), and a
            # result that is not finite becomes null with its reason; a floating-point warning
            # from a corner no one found yet must not reach the user's terminal as noise.
            if not os.environ.get("STAGEWISE_DEBUG"):
                warnings.simplefilter("ignore", RuntimeWarning)
            module = importlib.import_module(module_name)
            status = int(module.run(args))
        sys.stdout.flush()  # a reader that stopped early is met here, not at interpreter exit
        return status
    except BrokenPipeError:
        # The reader stopped reading (`stagewise analyze FILE | head`): not an error. Point stdout
        # at the null device so the interpreter's final flush does not complain either.
        _silence_stdout()
        return EXIT_OK
    except CommandError as error:
        _report(str(error))
        return EXIT_ERROR
    except ValueError as error:  # ProjectFileError, CircuitError, ValueSyntaxError
        if not _raised_by_us(error):
            return _internal_error(error)
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
        return _internal_error(error)


def _internal_error(error: Exception) -> int:
    if os.environ.get("STAGEWISE_DEBUG"):
        raise error
    _report(f"internal error ({type(error).__name__}: {error}); this is a fault in Stagewise, "
            "not in your file; run with STAGEWISE_DEBUG=1 to see where")
    return EXIT_ERROR


def _raised_by_us(error: ValueError) -> bool:
    """True when a ValueError is one of our sentences about the input, not a fault of ours.

    Our own error classes (``ProjectFileError``, ``CircuitError``, ``ValueSyntaxError``...) and a
    ``raise ValueError(...)`` written in Stagewise's code speak about the input; a plain
    ValueError from a library or a built-in (``math domain error`` from ``log10(0)``, a numpy
    shape mismatch) is a fault of ours, whatever input reached it.
    """
    import linecache  # noqa: PLC0415  (only on the error path)

    if type(error) is not ValueError:
        return type(error).__module__.startswith("stagewise")
    frame = error.__traceback__
    while frame is not None and frame.tb_next is not None:
        frame = frame.tb_next
    if frame is None:
        return False
    code = frame.tb_frame.f_code
    if "stagewise" not in code.co_filename.replace("\\", "/").split("/"):
        return False
    return linecache.getline(code.co_filename, frame.tb_lineno).lstrip().startswith("raise")


def _silence_stdout() -> None:
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):  # stdout without a file descriptor (a test's capture)
        pass


def _report(message: str) -> None:
    text = printable(" ".join(message.split()))
    if not text.endswith((".", "?", "!")):
        text += "."
    sys.stderr.write(f"stagewise: {text}\n")
