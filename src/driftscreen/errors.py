"""The one exception type for problems in what the user gave us.

Every input problem is reported as a single line naming the file, the place in it
(row, column, sample, taxon or parameter) and the fix. The library names the Python
parameter a problem is in (``parameter alpha``); the command line words it as the option
that sets it (``option --alpha``), prints ``driftscreen: error: <message>`` and exits with
status 2; no traceback.
"""

from __future__ import annotations

from collections.abc import Mapping


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
    parameter:
        The Python parameter that holds the problem, e.g. ``"alpha"``; ``None`` if none.
    """

    def __init__(self, problem: str, *, file: str | None = None, place: str | None = None,
                 fix: str | None = None, parameter: str | None = None) -> None:
        self.problem = problem
        self.file = file
        self.place = place
        self.fix = fix
        self.parameter = parameter
        super().__init__(self.one_line())

    def one_line(self, options: Mapping[str, str] | None = None) -> str:
        """``FILE: PLACE: PROBLEM; FIX``; the parameter comes first, as ``parameter NAME``
        or, where ``options`` maps its name to an option, as ``option --NAME``."""
        parameter = None
        if self.parameter is not None:
            option = (options or {}).get(self.parameter)
            parameter = f"option {option}" if option else f"parameter {self.parameter}"
        parts = [str(p) for p in (parameter, self.file, self.place) if p]
        head = ": ".join(parts + [self.problem])
        return f"{head}; {self.fix}" if self.fix else head
