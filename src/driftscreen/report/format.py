"""Fixed-width text: numbers, p-values, aligned tables and wrapped paragraphs.

The building blocks every report of :mod:`driftscreen.report` shares. Every line is at
most :data:`WIDTH` characters, numbers are printed with a fixed number of significant
digits, and nothing depends on the terminal.
"""

from __future__ import annotations

import math
import textwrap
from collections.abc import Sequence

from driftscreen.results import ALPHA, rejected

WIDTH = 78


def number(value: float, digits: int = 4) -> str:
    """A number in at most ``digits`` significant digits; '-' for missing."""
    if value is None or not math.isfinite(value):
        return "-"
    if value == 0:
        return "0"
    magnitude = abs(value)
    if magnitude >= 1e6 or magnitude < 1e-3:
        return f"{value:.{digits - 1}e}"
    return f"{value:.{digits}g}"


def pvalue_text(pvalue: float, replicates: int) -> str:
    """A p-value; at the resolution limit it is shown as '<= 1/(B+1)'."""
    if pvalue is None or not math.isfinite(pvalue):
        return "-"
    floor = 1.0 / (replicates + 1)
    if pvalue <= floor * (1 + 1e-9):
        return f"<={floor:.2g}"
    return f"{pvalue:.3f}" if pvalue >= 0.001 else f"{pvalue:.1e}"


def table(headers: Sequence[str], rows: Sequence[Sequence[str]],
          align: str | None = None) -> list[str]:
    """Aligned columns; ``align`` is one letter per column, 'l' or 'r' (default: l then r).

    Columns are two spaces apart, or one when two would make the table wider than WIDTH.
    """
    align = align or "l" + "r" * (len(headers) - 1)
    widths = [max(len(str(cell)) for cell in column) for column in zip(headers, *rows)]
    gap = "  " if sum(widths) + 2 * (len(widths) - 1) <= WIDTH else " "

    def line(cells: Sequence[str]) -> str:
        return gap.join(str(c).ljust(w) if a == "l" else str(c).rjust(w)
                        for c, w, a in zip(cells, widths, align)).rstrip()

    return [line(headers), line(["-" * w for w in widths])] + [line(row) for row in rows]


def heading(title: str, underline: str = "-") -> list[str]:
    return [title, underline * min(WIDTH, max(len(title), 20))]


def wrap(text: str, indent: str = "") -> list[str]:
    return textwrap.wrap(text, WIDTH, initial_indent=indent, subsequent_indent=indent) or [""]


def bullet_list(items: Sequence[str]) -> list[str]:
    lines: list[str] = []
    for item in items:
        lines += textwrap.wrap(item, WIDTH, initial_indent="  - ", subsequent_indent="    ")
    return lines


def key_values(pairs: Sequence[tuple[str, str]]) -> list[str]:
    width = max(len(k) for k, _ in pairs)
    return [f"{k.ljust(width)}  {v}" for k, v in pairs]


def percent(share: float) -> str:
    """A share in [0, 1] as a whole percentage; '<1%' and '>99%' near but not at 0 and 1."""
    if not math.isfinite(share):
        return "-"
    if 0 < share < 0.005:
        return "<1%"
    if 0.995 <= share < 1:
        return ">99%"
    return f"{100 * share:.0f}%"


def shorten_taxon(name: str, width: int) -> str:
    """``name`` cut in the middle to ``width`` characters, marked '~'.

    Start and end both stay: lineages and ids differ mostly at their ends
    ('...;Lachnospiraceae;genus_12'), names at their start.
    """
    if len(name) <= width:
        return name
    head = (width - 1) // 3
    return name[:head] + "~" + name[len(name) - (width - 1 - head):]


def taxon_cells(labels: Sequence[str], members: Sequence[int], width: int) -> list[str]:
    """Taxon labels cut to ``width``, keeping a pool's ' +N rare' suffix whole."""
    cells = []
    for label, count in zip(labels, members):
        suffix = f" +{count - 1} rare" if count > 1 and label.endswith(" rare") else ""
        head = label[:len(label) - len(suffix)]
        cells.append(shorten_taxon(head, max(width - len(suffix), 4)) + suffix)
    return cells


def taxon_table(headers: Sequence[str], labels: Sequence[str], members: Sequence[int],
                rows: Sequence[list[str]], align: str) -> list[str]:
    """:func:`table` whose first column, taxon labels, is cut so that lines fit in WIDTH."""
    others = sum(max([len(h)] + [len(r[c]) for r in rows]) for c, h in enumerate(headers[1:]))
    width = max(len(headers[0]), WIDTH - others - 2 * (len(headers) - 1))
    cells = taxon_cells(labels, members, width)
    return table(headers, [[cell] + list(row) for cell, row in zip(cells, rows)], align)


def qvalue_text(qvalue: float) -> str:
    """A q-value in three decimals (scientific below 0.001); '-' when missing."""
    if qvalue is None or not math.isfinite(qvalue):
        return "-"
    return f"{qvalue:.3f}" if qvalue >= 0.001 else f"{qvalue:.1e}"


def verdict_word(qvalue: float, alpha: float = ALPHA) -> str:
    """The screen's verdict on neutrality from the combined q-value."""
    if qvalue is None or not math.isfinite(qvalue):
        return "not tested"
    return "rejected" if rejected(qvalue, alpha) else "not rejected"


def wrapped_pairs(pairs: Sequence[tuple[str, str]]) -> list[str]:
    """Key-value lines whose long values wrap under themselves."""
    width = max(len(k) for k, _ in pairs)
    lines: list[str] = []
    for key, value in pairs:
        lines += textwrap.wrap(value, WIDTH, initial_indent=f"{key.ljust(width)}  ",
                               subsequent_indent=" " * (width + 2)) or [key]
    return lines


def shorten(text: str, width: int) -> str:
    """``text`` cut to ``width`` characters, a cut marked with '~'."""
    return text if len(text) <= width else text[:max(width - 1, 1)] + "~"


def sentence(text: str) -> str:
    """``text`` with a capital first letter and a full stop."""
    text = text.strip()
    return text[:1].upper() + text[1:] + ("" if text.endswith(".") else ".")
