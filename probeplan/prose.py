"""Text for a terminal: user strings escaped, and prose wrapped without splitting a number from
its unit. :mod:`probeplan.report` prints with them."""

from __future__ import annotations

import re
from collections.abc import Iterator

from rich.cells import cell_len
from rich.console import Console, ConsoleOptions, RenderResult
from rich.measure import Measurement
from rich.text import Text

#: A space the wrapping must not break (inside "z = 0 m", between a number and its unit).
_KEEP = "\u00a0"
#: Spaces to keep: between a number and its unit, and around "=" before a number.
_UNIT_SPACE = re.compile(
    r"(?<=\d) (?=(?:km|mm|m|MV/m|kV/m|V/m|mC|µC|nC|pC|C|%|s)(?![\w/]))"
    r"|(?<=\S) (?==\s[-+]?\d)|(?<=\S =) (?=[-+]?\d)"
)


def safe_text(value: object) -> str:
    """User text made safe for a terminal: every character Python does not print as itself
    (``str.isprintable``: control characters, escape sequences, bidirectional overrides,
    line and paragraph separators) is shown as its escape, the way ``repr`` shows it.

    Parameters
    ----------
    value : object
        A title, a name, a path, a message, or anything read from a file (``str(value)``).

    Returns
    -------
    str
        e.g. ``"bay\\x1b[2J"`` for a title holding ESC [ 2 J.
    """
    text = str(value)
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


class Prose:
    """Text wrapped at plain spaces only, so that a number keeps its unit ("z = 0 m", "7.99
    km" never split); a continued line is indented two more than the line it continues.

    Parameters
    ----------
    text : rich Text
        May hold several lines (``\\n``); its styles are kept.
    """

    def __init__(self, text: Text, hang: bool = True) -> None:
        self.hang = hang
        plain = _UNIT_SPACE.sub(_KEEP, text.plain)
        # One character for one: the styles' spans stay where they were.
        self.text = Text(plain, style=text.style, spans=list(text.spans), end=text.end)

    def __rich_console__(self, console: Console, options: ConsoleOptions) -> RenderResult:
        width = max(options.max_width, 8)
        for line in self.text.split("\n", allow_blank=True):
            yield from _wrapped(line, width, self.hang)

    def __rich_measure__(self, console: Console, options: ConsoleOptions) -> Measurement:
        plain = self.text.plain
        words = [cell_len(w) for w in re.split(r"[ \n]+", plain) if w] or [0]
        lines = [cell_len(line) for line in plain.split("\n")] or [0]
        return Measurement(max(words), max(lines))


def _wrapped(line: Text, width: int, hang: bool) -> Iterator[Text]:
    """The lines of one line of text at ``width`` cells (the kept spaces become spaces)."""
    plain = line.plain
    lead = len(plain) - len(plain.lstrip(" "))
    hang = lead + 2 if hang and lead + 2 <= width // 2 else lead if lead <= width // 2 else 0
    breaks, start, indent, first = [], 0, 0, True
    for m in re.finditer(r"[^ ]+", plain):
        if not first and indent + cell_len(plain[start : m.end()]) > width:
            breaks.append(m.start())
            start, indent = m.start(), hang
        first = False
    for k, part in enumerate(line.divide(breaks)):
        part.rstrip()
        if k:
            part = Text(" " * hang) + part
        out = Text(part.plain.replace(_KEEP, " "), style=part.style, spans=list(part.spans))
        out.overflow = "fold"  # only a single word longer than the line is ever cut
        yield out
