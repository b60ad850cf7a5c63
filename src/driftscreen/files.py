"""Safe file output: nothing half-written is ever left under a final name.

Output places given by the user are checked before the analysis starts
(:func:`check_output_file`, :func:`check_output_folder`): a bad one is a one-line
:class:`driftscreen.errors.InputError` naming the option, the path and the fix. Files
are written with the permissions the user's umask gives new files.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from collections.abc import Iterable, Mapping
from pathlib import Path

from driftscreen.errors import InputError

#: Permission bits of a new file before the umask (as ``open`` gives them).
NEW_FILE_MODE = 0o666


def atomic_write_bytes(path: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``path`` via a temporary file in the same folder and a rename.

    Raises
    ------
    InputError
        If the folder cannot be created or written (the message names the path).
    """
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.",
                                             suffix=".part")
    except OSError as error:
        raise write_error(path, error) from None
    try:
        with os.fdopen(handle, "wb") as stream:
            os.fchmod(stream.fileno(), NEW_FILE_MODE & ~current_umask())
            stream.write(data)
            stream.flush()
            os.fsync(stream.fileno())
        os.replace(temporary, path)
    except BaseException as error:
        Path(temporary).unlink(missing_ok=True)
        if isinstance(error, OSError):
            raise write_error(path, error) from None
        raise
    return path


def atomic_write_text(path: str | os.PathLike, text: str) -> Path:
    """Write ``text`` (UTF-8, ``\\n`` line ends) to ``path`` atomically."""
    return atomic_write_bytes(path, text.encode("utf-8"))


def current_umask() -> int:
    """The process's umask (read by setting it and putting it back)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def write_error(path: Path, error: OSError) -> InputError:
    """The one-line message of a write that failed although its place was checked."""
    return InputError(f"cannot write the file ({error.strerror or error})", file=str(path),
                      fix="check that the folder exists, is writable and has space left")


def sha256_of(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file's bytes (for provenance in reports)."""
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def check_output_file(path: str | os.PathLike, option: str,
                      inputs: Iterable[str | os.PathLike] = ()) -> None:
    """``path`` can be written as a file by the option ``option`` and is not an input.

    Raises
    ------
    InputError
        A folder or something else that is not a regular file (``/dev/null``), a path
        under a file or in a folder that cannot be written, or one of ``inputs``
        (also through a symbolic or hard link).
    """
    path = Path(path)
    place = f"option {option}"
    if path.is_dir():
        raise InputError("is a folder, not a file", file=str(path), place=place,
                         fix=f"give a file name, e.g. {path / 'report.txt'}")
    if path.exists() and not path.is_file():
        raise InputError("is not a regular file", file=str(path), place=place,
                         fix="give the name of a file to write")
    for source in inputs:
        if same_file(path, source):
            raise InputError(f"is the input file {source} (inputs are never overwritten)",
                             file=str(path), place=place, fix="give another file name")
    check_writable_folder(path.parent, path, place)


def check_output_folder(path: str | os.PathLike, option: str,
                        inputs: Iterable[str | os.PathLike] = (),
                        writes: Iterable[str] = ()) -> None:
    """``path`` is, or can be created as, a writable folder; the files ``writes`` it will
    hold pass :func:`check_output_file` (so none of them is one of ``inputs``).

    Raises
    ------
    InputError
        A file (or a link to one, or ``/dev/null``) rather than a folder, a broken link, a
        path under a file, a folder that cannot be written, or a written file that is an
        input.
    """
    path = Path(path)
    place = f"option {option}"
    if path.is_symlink() and not path.exists():
        raise InputError("is a link to nothing", file=str(path), place=place,
                         fix="remove the link, or give another folder")
    if path.exists() and not path.is_dir():
        raise InputError("is a file, not a folder", file=str(path), place=place,
                         fix="give a folder (it is created if needed)")
    check_writable_folder(path, path, place)
    inputs = tuple(inputs)
    for name in writes:
        check_output_file(path / name, option, inputs)


def check_writable_folder(folder: Path, given: Path, place: str) -> None:
    """The nearest existing folder of ``folder`` (itself or a parent) is writable."""
    existing = nearest_existing(folder)
    if not existing.is_dir():
        raise InputError(f"is under the file {existing}, not in a folder", file=str(given),
                         place=place, fix="give a path in a folder")
    if not os.access(existing, os.W_OK | os.X_OK):
        raise InputError(f"cannot write into the folder {existing} (permission denied)",
                         file=str(given), place=place, fix="choose a folder you can write to")


def nearest_existing(folder: Path) -> Path:
    """``folder`` or its nearest parent that exists (the current folder at the latest)."""
    absolute = folder.absolute()
    for candidate in (absolute, *absolute.parents):
        if candidate.exists() or candidate.is_symlink():
            return candidate
    return absolute


def same_place(path: str | os.PathLike, other: str | os.PathLike) -> bool:
    """True if both paths lead to the same place, existing or not (links resolved)."""
    return os.path.realpath(path) == os.path.realpath(other) or same_file(Path(path), other)


def same_file(path: Path, other: str | os.PathLike) -> bool:
    """True if both paths exist and name one file (through links too)."""
    try:
        return path.exists() and os.path.samefile(path, other)
    except OSError:
        return False


def check_distinct_outputs(places: Mapping[str, str | os.PathLike | None]) -> None:
    """No two output places of one command (by option) are the same place."""
    given = [(option, path) for option, path in places.items() if path]
    for index, (option, path) in enumerate(given):
        for earlier, other in given[:index]:
            if same_place(path, other):
                raise InputError(f"is also given as {earlier}", file=str(path),
                                 place=f"option {option}",
                                 fix=f"give {option} a place of its own")
