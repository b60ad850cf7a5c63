"""The one exception type for problems in what the user gave us.

Every input problem is reported as a single line naming the file, the place in it
(row, column, sample, taxon or option) and the fix. The command line prints
``driftscreen: error: <message>`` and exits with status 2; no traceback.
"""

from __future__ import annotations


class InputError(ValueError):
    """A problem in user input, rendered as one line: ``FILE: PLACE: PROBLEM; FIX``.

    Parameters
    ----------
    problem:
        What is wrong, in plain words.
    file:
        The file (or ``"option --name"``) the problem is in; ``None`` if not file-bound.
    place:
        Row, column, sample or taxon, e.g. ``"row 7, column 'day'"``.
    fix:
        What the user should do about it.
    """

    def __init__(self, problem: str, *, file: str | None = None, place: str | None = None,
                 fix: str | None = None) -> None:
        self.problem = problem
        self.file = file
        self.place = place
        self.fix = fix
        super().__init__(self.one_line())

    def one_line(self) -> str:
        parts = [str(p) for p in (self.file, self.place) if p]
        head = ": ".join(parts + [self.problem])
        return f"{head}; {self.fix}" if self.fix else head
