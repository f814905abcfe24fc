"""Text that reads at any width: tables that fit the console or become one record per line, and prose wrapped
only between words. Torch-free (rich and the standard library); the command line and the report use it alike.

The rule, the same for every command:

- a table is printed as a table when it fits the console's width with every cell on one line (nothing inside a
  cell is wrapped, folded or cut);
- otherwise each row becomes a record: its first cell (the layer name, the quantity, the budget) on a line of its
  own, then ``column: value`` pairs, wrapped between pairs. A name is never shortened or split;
- titles, notes and messages wrap at spaces only: a word longer than the line (a path, a layer name) stays whole
  on a line of its own, and the terminal may wrap it, but it is never cut into pieces in the text itself.

Into a pipe or file the console is 120 columns wide (see ``factorize.cli.render``); ``--json`` is the machine
form and does not pass through here.
"""

from __future__ import annotations

import textwrap
from collections.abc import Sequence

from rich.console import Console
from rich.table import Table
from rich.text import Text

from factorize.errors import printable

RECORD_INDENT = "    "
WIDE = 10**6  # measuring width: a table's natural width, nothing wrapped


def wrap_words(text: str, width: int, indent: str = "", first_indent: str = "") -> list[str]:
    """``text`` as lines of at most ``width`` columns, broken at spaces only; each paragraph (line break) kept.
    A word longer than the line gets a line of its own, whole."""
    wrapper = textwrap.TextWrapper(width=max(width, 1), break_long_words=False, break_on_hyphens=False,
                                   initial_indent=first_indent, subsequent_indent=indent)
    lines: list[str] = []
    for paragraph in str(text).split("\n"):
        lines.extend(wrapper.wrap(paragraph) or [""])
    return lines


def print_words(console: Console, text: str, *, prefix: str = "", style: str | None = None,
                prefix_style: str | None = None) -> None:
    """Print ``prefix`` + ``text`` on ``console``, wrapped at word boundaries to its width (no markup read,
    control characters escaped)."""
    lines = wrap_words(printable(prefix + str(text)), console.width)
    for i, line in enumerate(lines):
        out = Text(line, style=style or "")
        if i == 0 and prefix and prefix_style:
            out.stylize(prefix_style, 0, len(prefix))
        console.print(out, soft_wrap=True, highlight=False)


def print_table(console: Console, table: Table) -> None:
    """Print ``table`` whole when it fits ``console`` with every cell on one line, else one record per row.
    The table's title is printed above it, wrapped between words."""
    if table.title:
        print_words(console, _plain(table.title), style="italic")
    headers = [printable(_plain(c.header)) for c in table.columns]
    rows = list(zip(*[[printable(_plain(cell)) for cell in c.cells] for c in table.columns]))
    whole = Table(title=None, show_lines=table.show_lines)
    for column, header in zip(table.columns, headers):
        whole.add_column(header, justify=column.justify, no_wrap=True, overflow="ellipsis")
    for row in rows:
        whole.add_row(*[Text(cell) for cell in row])  # Text: names are never read as markup
    if console.measure(whole, options=console.options.update_width(WIDE)).maximum <= console.width:
        console.print(whole)
        return
    for row in rows:
        for line in record_lines(headers, row, console.width):
            console.print(Text(line), soft_wrap=True, highlight=False)


def record_lines(headers: Sequence[str], row: Sequence[str], width: int) -> list[str]:
    """One row as a record: its first cell on a line (``header value`` when the cell is only a number), then
    ``header: value`` pairs packed into indented lines of at most ``width`` columns, broken between pairs."""
    head = row[0] if any(ch.isalpha() for ch in row[0]) else f"{headers[0]} {row[0]}"
    pairs = [f"{h}: {v}" for h, v in zip(headers[1:], row[1:]) if v.strip()]
    groups, current = [], ""
    for pair in pairs:
        joined = f"{current}; {pair}" if current else pair
        if current and len(RECORD_INDENT) + len(joined) > width:
            groups.append(current)
            current = pair
        else:
            current = joined
    groups += [current] if current else []
    lines = [head]
    for group in groups:  # a pair longer than the line is wrapped between its words
        lines.extend(wrap_words(group, width, indent=RECORD_INDENT, first_indent=RECORD_INDENT))
    return lines


def _plain(value) -> str:
    return value.plain if isinstance(value, Text) else str(value)
