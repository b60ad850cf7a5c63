"""The one exception type for problems in what the user gave us.

Every input problem is reported as a single line naming the file, the place in it
(row, column, sample, taxon or parameter) and the fix. The library names the Python
parameter a problem is in (``parameter alpha``); the command line words it as the option
that sets it (``option --alpha``), prints ``driftscreen: error: <message>`` and exits with
status 2; no traceback. A problem or its fix that mentions a parameter does so through
:func:`mention`, so each audience reads its own word for it.
"""

from __future__ import annotations

import re
from collections.abc import Mapping

#: A mention of a parameter in an error's text: ``[[name]]``, or ``[[parameter name]]``
#: for "parameter name" / "option --name".
MENTION = re.compile(r"\[\[(parameter )?(\w+)\]\]")


def mention(parameter: str, *, named: bool = False) -> str:
    """A parameter in the text of an :class:`InputError`: worded as ``parameter`` by the
    library and as its option by the command line (``named``: with the word "parameter"
    or "option" before it)."""
    return f"[[parameter {parameter}]]" if named else f"[[{parameter}]]"


def worded(text: str, options: Mapping[str, str] | None = None) -> str:
    """``text`` with every :func:`mention` as the option ``options`` maps it to, else as
    the parameter itself."""
    def word(match: re.Match[str]) -> str:
        name = match.group(2)
        option = (options or {}).get(name)
        if match.group(1):
            return f"option {option}" if option else f"parameter {name}"
        return option or name

    return MENTION.sub(word, text)


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
        self._texts = (problem, place, fix)  # with their mentions, for one_line
        self.problem = worded(problem)
        self.file = file
        self.place = None if place is None else worded(place)
        self.fix = None if fix is None else worded(fix)
        self.parameter = parameter
        super().__init__(self.one_line())

    def one_line(self, options: Mapping[str, str] | None = None) -> str:
        """``FILE: PLACE: PROBLEM; FIX``; the parameter comes first, as ``parameter NAME``
        or, where ``options`` maps its name to an option, as ``option --NAME``, and every
        parameter the text mentions is worded the same way."""
        problem, place, fix = (None if text is None else worded(text, options)
                               for text in self._texts)
        parameter = None
        if self.parameter is not None:
            option = (options or {}).get(self.parameter)
            parameter = f"option {option}" if option else f"parameter {self.parameter}"
        parts = [str(p) for p in (parameter, self.file, place) if p]
        head = ": ".join(parts + [problem])
        return f"{head}; {fix}" if fix else head
