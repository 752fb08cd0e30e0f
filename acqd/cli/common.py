"""What several sub-commands share: the options of the CLI convention, the console, the safety note, the
verdict's colour and the one-line record summary.

The convention (one meaning per option in every sub-command) lives here as one function per option, so a
sub-command cannot spell ``--record`` or ``--out`` its own way: a positional ``STORE``; ``-r/--record N``
(default the last record); ``-o/--out PATH`` for the one file a command writes; ``--figures DIR`` for a
folder of figures; ``-p/--profile FILE`` where a profile is optional; ``-n/--count N``; ``--last N``;
``--json``; ``-d/--data-dir DIR``. Bad values are ``ConfigError`` lines naming the sub-command and the
option (argparse lets an exception that is not a ``ValueError`` or ``TypeError`` through its type calls).
"""

from __future__ import annotations

import argparse
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.segment import Segment
from rich.text import Text
from rich.theme import Theme

from ..config import SHOWN_CHARS, finite_float, shown
from ..display import edge_label, si_alike
from ..errors import ConfigError
from ..record import Record, bench_id_problem

SAFETY_NOTE = (
    "Caution: bench instruments are mains powered and a scope's probe ground is tied to protective earth; "
    "never clip a ground lead to a node that is not at earth. Keep outputs inside the DUT's ratings. "
    "Follow local codes and licensed practice."
)
DEFAULT_DATA_DIR = Path("data")

# The verdict is the one thing coloured: green pass, red FAIL; "untested" stays plain.
VERDICT_STYLES = {"pass": ("pass", "green"), "fail": ("FAIL", "bold red"), "untested": ("untested", "")}
# rich's progress bar and its counters are coloured by default; monochrome here, so colour keeps one meaning.
_PLAIN_PROGRESS = Theme({"bar.back": "dim", "bar.complete": "bold", "bar.finished": "bold", "bar.pulse": "bold",
                         "progress.elapsed": "none", "progress.download": "none", "progress.percentage": "none",
                         "progress.remaining": "none", "progress.spinner": "none", "table.caption": "none"})


# -- the console ---------------------------------------------------------------------------------------
# Control characters (C0 but tab and newline, DEL, C1) from files or instruments must not reach a terminal:
# an ESC in a stored channel name could recolour it, move the cursor or set the window title. Shown as "?".
_UNPRINTABLE = {c: "?" for c in (*range(0x00, 0x20), *range(0x7F, 0xA0)) if chr(c) not in "\t\n"}


def printable(text: str) -> str:
    """``text`` with every control character but tab and newline shown as "?" (for plain ``print``s)."""
    return text.translate(_UNPRINTABLE)


class _Console(Console):
    """rich's console, but the text of every segment it writes goes through ``printable`` first — every
    table, ``Text`` and progress line, whatever built it. Segments rich marks as control (its own cursor
    moves) and the style codes it adds around text are left alone."""

    def _render_buffer(self, buffer: Iterable[Segment]) -> str:
        return super()._render_buffer(Segment(text if control else printable(text), style, control)
                                      for text, style, control in buffer)


def console(wide: bool = False, **options: Any) -> Console:
    """The one way a sub-command gets a console: rich's automatic highlighting off (it coloured dates and
    words such as "record(s)" as if they were code), emoji codes off, monochrome progress bars. Markup
    stays on for the tables that use it; text from files and instruments goes in as ``rich.text.Text``
    (markup would swallow a ``[dut]``). ``wide``: in a pipe or a log file, wide enough that
    tables do not wrap; in a terminal its own width."""
    made = _Console(highlight=False, emoji=False, theme=_PLAIN_PROGRESS, **options)
    if wide and not made.is_terminal and "width" not in options:
        made = _Console(highlight=False, emoji=False, theme=_PLAIN_PROGRESS, width=160, **options)
    return made


@contextmanager
def progress_bar(out: Console) -> Iterator[Progress]:
    """rich's progress bar (what, a bar, N of M, time so far) on ``out``, gone when done, and off when
    ``out`` is not a terminal, so a pipe or a log file gets no control codes. Lines printed through
    ``progress.console`` meanwhile appear above it."""
    with Progress(TextColumn("{task.description}", markup=False),  # a profile's name is text, not markup
                  BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(), console=out, transient=True,
                  disable=not out.is_terminal) as progress:
        yield progress


def verdict_text(verdict: str | None, upper: bool = False) -> Text:
    """The comparator's verdict as a person reads it, in its colour; an unknown or missing one plain.
    ``upper`` for a verdict that stands on its own line (``verdict: PASS``)."""
    word, style = VERDICT_STYLES.get(verdict or "", (verdict or "not compared", ""))
    return Text(word.upper() if upper else word, style=style)


# -- the options of the convention -------------------------------------------------------------------------
class Parser(argparse.ArgumentParser):
    """argparse, with two habits changed: a wrong command line is one ``acqd: error:`` line like any other
    bad input (not usage text and a second line), and no option is taken from its first letters, so an old
    ``--data`` is refused rather than read as ``--data-dir`` and ``--record`` never as ``--records``."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, allow_abbrev=False, **kwargs)

    def error(self, message: str) -> NoReturn:
        raise ConfigError(self.prog, "", f"{message}; see {self.prog} --help")

    def parse_args(self, args: Any = None, namespace: Any = None) -> argparse.Namespace:  # type: ignore[override]
        """As argparse's, but an argument no option takes is blamed on the sub-command it was given to."""
        parsed, extra = self.parse_known_args(args, namespace)
        if extra:
            prog = f"{self.prog} {parsed.command}" if getattr(parsed, "command", None) else self.prog
            raise ConfigError(prog, "", f"unrecognized arguments: {' '.join(extra)}; see {prog} --help")
        return parsed


def add_command(sub: argparse._SubParsersAction, name: str, help: str, description: str) -> argparse.ArgumentParser:
    """A sub-command with its one-line help (``acqd --help``) and its description (``acqd NAME --help``):
    both required, so no sub-command can go without."""
    return sub.add_parser(name, help=help, description=description)


# Every count, index and port a command line gives is at most this: a 400-digit --count ran "forever".
MAX_WHOLE_NUMBER = 1_000_000_000
def whole_number(command: str, option: str, minimum: int,
                 maximum: int = MAX_WHOLE_NUMBER) -> Callable[[str], int]:
    """An argparse ``type`` for a whole number from ``minimum`` to ``maximum`` that fails as one
    ``acqd: error:`` line."""
    def parse(text: str) -> int:
        if len(text) > SHOWN_CHARS:
            raise ConfigError(command, option, f"{shown(text)} is longer than any number allowed here "
                                               f"(at most {maximum:,})")
        try:
            value = int(text)
        except ValueError:
            raise ConfigError(command, option, f"{text!r} is not a whole number") from None
        if value < minimum:
            raise ConfigError(command, option, f"must be {minimum} or more, not {value}")
        if value > maximum:
            raise ConfigError(command, option, f"must be at most {maximum:,}, not {value}")
        return value
    return parse


def finite_number(command: str, option: str, text: str) -> float:
    """``text`` as a finite float, or one ``acqd: error:`` line naming the option."""
    return finite_float(command, option, text)


def written_file(command: str, option: str) -> Callable[[str], Path]:
    """An argparse ``type`` for a file a command writes: if it exists it must be a regular file. A device
    (``/dev/null``), a FIFO or a folder is refused: writing beside it and renaming (as the report does)
    would replace ``/dev/null`` itself, and opening a FIFO waits for a reader that never comes."""
    def parse(text: str) -> Path:
        path = Path(text)
        if path.is_dir():
            raise ConfigError(command, option, f"{text} is a folder; name the file to write in it")
        if path.exists() and not path.is_file():
            raise ConfigError(command, option, f"{text} is not a regular file (a device, a FIFO or a socket); "
                                               f"name a file to write")
        return path
    return parse


def figures_folder(command: str, option: str) -> Callable[[str], Path]:
    """An argparse ``type`` for a folder of figures: made if missing, but never a file that exists."""
    def parse(text: str) -> Path:
        path = Path(text)
        if path.exists() and not path.is_dir():
            raise ConfigError(command, option, f"{text} is not a folder; name a folder for the figures "
                                               f"(it is made if missing)")
        return path
    return parse


def made_folder(folder: Path, command: str, option: str) -> Path:
    """``folder`` made (with its parents) before any work is done, or one line saying why it cannot be."""
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConfigError(command, option, f"folder {folder} cannot be made ({exc.strerror})") from None
    return folder


def add_store(parser: argparse.ArgumentParser, help: str = "the record store, e.g. data/night.h5 (or one segment file)"
              ) -> None:
    parser.add_argument("store", metavar="STORE", help=help)


def add_record(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("-r", "--record", metavar="N", type=whole_number(parser.prog, "--record", 0),
                        help="the record's index, as acqd ls lists it (default: the last record)")


def add_out(parser: argparse.ArgumentParser, help: str, required: bool = False) -> None:
    parser.add_argument("-o", "--out", metavar="FILE", type=written_file(parser.prog, "--out"), required=required,
                        help=help)


def add_figures(parser: argparse.ArgumentParser | argparse._ArgumentGroup, help: str, command: str = "") -> None:
    """``--figures DIR``; ``command`` names the sub-command when ``parser`` is one of its argument groups."""
    parser.add_argument("--figures", metavar="DIR", type=figures_folder(command or parser.prog, "--figures"),
                        help=help)


def add_profile(parser: argparse.ArgumentParser, help: str) -> None:
    parser.add_argument("-p", "--profile", metavar="FILE", help=help)


def add_count(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("-n", "--count", metavar="N", type=whole_number(parser.prog, "--count", 1), default=1,
                        help="number of step tests (default 1)")


def add_last(parser: argparse.ArgumentParser, what: str) -> None:
    parser.add_argument("--last", metavar="N", type=whole_number(parser.prog, "--last", 1),
                        help=f"only the last N records {what} (default: all)")


def add_json(parser: argparse.ArgumentParser, help: str = "print JSON instead of a table") -> None:
    parser.add_argument("--json", action="store_true", help=help)


def add_data_dir(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("-d", "--data-dir", metavar="DIR", type=Path, default=DEFAULT_DATA_DIR,
                        help="the daemon's data directory: records, run log, job store (default: ./data)")


def add_bench_id(parser: argparse.ArgumentParser, help: str) -> None:
    """``--bench-id ID``: a bench's name, checked as the profile's ``[bench] bench_id`` is."""
    def parse(text: str) -> str:
        if bench_id_problem(text):
            raise ConfigError(parser.prog, "--bench-id", bench_id_problem(text))
        return text
    parser.add_argument("--bench-id", metavar="ID", type=parse, help=help)


def chosen_record(reader: Any, store: str, number: int | None) -> int:
    """The store index ``-r/--record`` names, or the last record's; a store with none is one error line."""
    if number is not None:
        return number
    summaries = reader.index()
    if not summaries:
        raise ConfigError(store, "", "holds no records")
    return summaries[-1].index


# -- one line per record ------------------------------------------------------------------------------------
def levels(record: Record, channel: str) -> tuple[float, float]:
    """(pre-trigger baseline, final level) of a channel: the mean of the pre-trigger samples and of the last tenth."""
    samples = record.channel(channel).samples
    pre = record.timebase.pretrigger_samples
    baseline = float(np.mean(samples[:pre])) if pre else float("nan")
    return baseline, float(np.mean(samples[-max(1, len(samples) // 10):]))


def utc_text(utc: str) -> str:
    """``2026-12-02 04:46:49``: an ISO 8601 UTC time to the second, as every table shows it."""
    return utc[:19].replace("T", " ")


def record_line(index: int, record: Record) -> Text:
    """``#12 2026-12-02 03:50:01 rising 0 V → 1 V, v_c 0.001 V → 0.999 V pass``: what a bench engineer
    scans for.

    The levels are those of the last scope input (by the profile's order, the DUT's output comes last);
    math channels are left out because they are derived.
    """
    captured = [c for c in record.channels if c.source.upper().startswith("CH")] or record.channels
    shown = captured[-1]
    before, after = si_alike(list(levels(record, shown.name)), shown.unit)
    stim = record.stimulus
    line = Text(f"#{index} {utc_text(record.utc)} {edge_label(stim.edge, stim.low_v, stim.high_v)}, "
                f"{shown.name} {before} → {after}")
    verdict = (record.analysis or {}).get("verdict")
    return line.append(" ").append_text(verdict_text(verdict)) if verdict else line
