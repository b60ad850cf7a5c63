"""The resume store of a screen: finished datasets survive an interrupted run.

Layout inside the output folder::

    DIR/.driftscreen/settings.json           the settings fingerprint of the run
    DIR/.driftscreen/datasets/<name>.json    one record per finished dataset

Every file is written through a temporary file and a rename
(:func:`driftscreen.files.atomic_write_text`), so a killed run leaves either a whole record
or none. The fingerprint holds everything that changes results: the driftscreen version,
the SHA-256 of every input file, the intake options, replicates, groupings, seed and the
configured statistics, and the options of the follow-ups (:func:`screen_fingerprint`:
``detectable`` when on, ``influence`` when off, the null's options, the per-taxon scan).
A run with the same fingerprint reuses every finished record; a run with another
fingerprint is refused, naming what differs. A record holds the dataset's result with its
follow-ups (e.g. its most influential sample), so a resumed run does not redo them. A settings file or record that cannot be read, or is of another
layout, means the folder holds no store of this version: it is refused in one line (a new
``--out``, or remove the store folder), never overwritten and never mixed with a new run.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from driftscreen.calibrate import CalibrationSettings
from driftscreen.errors import InputError, mention
from driftscreen.files import atomic_write_text, sha256_of
from driftscreen.power import detectable_settings
from driftscreen.statistics.registry import default_statistics
from driftscreen.taxon_scan import VERSION as TAXON_SCAN_VERSION
from driftscreen.version import __version__

STORE_FOLDER = ".driftscreen"
SETTINGS_FILE = "settings.json"
RECORDS_FOLDER = "datasets"
#: Version of the store's own layout; part of the fingerprint.
STORE_FORMAT = 2
#: Fingerprint entries that are shown but never compared (the same bytes may be moved).
NOT_COMPARED = ("path",)
#: Intake options that enter the fingerprint only when given: a screen without them has the
#: fingerprint (and ``results.json``) of a run from before they existed.
GIVEN_ONLY = ("replicate_by",)
#: Fingerprint entry of a screen run without the most influential samples.
INFLUENCE_OFF = "off"


def settings_fingerprint(*, inputs: Mapping[str, str | os.PathLike],
                         intake: Mapping[str, Any], replicates: int, groupings: int,
                         seed: int, statistics: Sequence[str]) -> dict[str, Any]:
    """Everything that determines a screen's results, as a JSON-safe dictionary.

    Parameters
    ----------
    inputs:
        Input files by role (``"counts"``, ``"metadata"``, ``"taxon_map"``).
    intake:
        Intake options (JSON-safe values), keyed by their ``read_datasets`` names.
    replicates, groupings, seed:
        Calibration settings.
    statistics:
        Descriptions of the configured statistics (e.g. their reprs with all options).
    """
    return {
        "store_format": STORE_FORMAT,
        "driftscreen_version": __version__,
        "inputs": {role: {"path": str(path), "sha256": sha256_of(path)}
                   for role, path in inputs.items()},
        "intake": dict(intake),
        "replicates": int(replicates),
        "groupings": int(groupings),
        "seed": int(seed),
        "statistics": list(statistics),
    }


def screen_fingerprint(*, inputs: Mapping[str, str | os.PathLike | None],
                       intake: Mapping[str, Any], settings: CalibrationSettings,
                       detectable: bool, influence: bool) -> dict[str, Any]:
    """The settings fingerprint of a screen (:func:`settings_fingerprint`) with the options
    of its follow-ups.

    ``inputs`` are the input files by role (``None`` where not given); ``intake`` are all
    intake options of :func:`driftscreen.intake.read_datasets` (defaults filled in), of which
    ``taxon_map`` counts as an input file.
    """
    fingerprint = settings_fingerprint(
        inputs={role: path for role, path in inputs.items() if path is not None},
        intake={k: v for k, v in intake.items()
                if k != "taxon_map" and not (k in GIVEN_ONLY and v is None)},
        replicates=settings.replicates, groupings=settings.groupings, seed=settings.seed,
        statistics=configured_statistics(settings.groupings))
    if detectable:
        fingerprint["detectable"] = detectable_settings()
    if not influence:
        fingerprint["influence"] = INFLUENCE_OFF
    fingerprint["null"] = {"read_noise": settings.null.noise, "start": settings.null.start}
    fingerprint["taxon_scan"] = TAXON_SCAN_VERSION
    return fingerprint


def configured_statistics(groupings: int) -> list[str]:
    """The configured statistics with all their options (their reprs)."""
    return [repr(s) for s in default_statistics(time_series=True, n_groupings=groupings)]


def canonical_json(data: Any) -> str:
    """Deterministic JSON text (sorted keys, no NaN) for hashing and comparing."""
    return json.dumps(data, sort_keys=True, allow_nan=False, separators=(",", ":"))


def comparable(fingerprint: Mapping[str, Any]) -> dict[str, Any]:
    """The fingerprint without the entries that are only shown (input paths)."""
    inputs = {role: {k: v for k, v in entry.items() if k not in NOT_COMPARED}
              for role, entry in fingerprint.get("inputs", {}).items()}
    return {**fingerprint, "inputs": inputs}


def fingerprint_key(fingerprint: Mapping[str, Any]) -> str:
    """SHA-256 of the compared part of a fingerprint; stamped on every record."""
    return hashlib.sha256(canonical_json(comparable(fingerprint)).encode("utf-8")).hexdigest()


def describe(key: str, value: Any) -> str:
    """A fingerprint value as the user knows it."""
    if key.startswith("inputs."):
        return "file content " + (value["sha256"][:12] if isinstance(value, dict) else "absent")
    if key == "statistics":
        return "; ".join(value) if isinstance(value, list) else repr(value)
    if key == "influence":
        return "on" if value is None else f"{value} (--no-influence)"
    return "none" if value is None else str(value)


def label(key: str) -> str:
    """The option or item a fingerprint key stands for."""
    if key.startswith("inputs."):
        return f"{key.split('.', 1)[1]} file"
    if key.startswith("intake."):
        return "--" + key.split(".", 1)[1].replace("_", "-")
    if key in ("replicates", "groupings", "seed"):
        return f"--{key}"
    if key.startswith("null."):
        return "--" + key.split(".", 1)[1].replace("_", "-")
    if key == "influence":
        return "most influential samples"
    return key.replace("_", " ")


def flat_entries(fingerprint: Mapping[str, Any]) -> dict[str, Any]:
    """``{"seed": 1, "intake.time_by": "day", "null.start": "first-sample", ...}``."""
    entries: dict[str, Any] = {}
    for key, value in comparable(fingerprint).items():
        if key in ("inputs", "intake", "null") and isinstance(value, dict):
            entries.update({f"{key}.{k}": v for k, v in value.items()})
        else:
            entries[key] = value
    return entries


def differences(stored: Mapping[str, Any], current: Mapping[str, Any]) -> list[str]:
    """What differs between two fingerprints, one short phrase per item."""
    old, new = flat_entries(stored), flat_entries(current)
    phrases = []
    for key in sorted(set(old) | set(new)):
        if canonical_json(old.get(key)) != canonical_json(new.get(key)):
            phrases.append(f"{label(key)}: {describe(key, old.get(key))} there, "
                           f"{describe(key, new.get(key))} now")
    return phrases


def record_file_name(name: str) -> str:
    """A safe, unique file name for dataset ``name`` (readable prefix + name hash)."""
    slug = re.sub(r"[^A-Za-z0-9._-]+", "_", name).strip("._")[:40] or "dataset"
    digest = hashlib.sha256(name.encode("utf-8")).hexdigest()[:12]
    return f"{slug}-{digest}.json"


class ResultStore:
    """Finished datasets of one screen, kept in ``DIR/.driftscreen``.

    Use :meth:`open`, which checks the settings fingerprint against what ``DIR`` holds.
    """

    def __init__(self, out: Path, fingerprint: Mapping[str, Any]) -> None:
        self.out = Path(out)
        self.fingerprint = dict(fingerprint)
        self.key = fingerprint_key(fingerprint)

    @property
    def folder(self) -> Path:
        return self.out / STORE_FOLDER

    @property
    def settings_path(self) -> Path:
        return self.folder / SETTINGS_FILE

    @property
    def records_folder(self) -> Path:
        return self.folder / RECORDS_FOLDER

    @classmethod
    def open(cls, out: str | os.PathLike, fingerprint: Mapping[str, Any]) -> ResultStore:
        """The store in ``out``: created if new, checked if present.

        Raises
        ------
        InputError
            If ``out`` holds a store made with other settings (the message names every
            difference and the fix).
        """
        store = cls(Path(out), fingerprint)
        stored = store.stored_fingerprint()
        store.check_records_folder()
        if stored is None:
            atomic_write_text(store.settings_path, json.dumps(store.fingerprint, indent=1,
                                                              allow_nan=False) + "\n")
        elif fingerprint_key(stored) != store.key:
            changed = "; ".join(differences(stored, fingerprint) or ["store format"])
            raise InputError(f"holds results of a screen with other settings ({changed})",
                             file=str(store.out), place=mention("out", named=True),
                             fix=f"give another {mention('out')} folder, or remove this one to "
                                 "start afresh")
        return store

    def stored_fingerprint(self) -> dict[str, Any] | None:
        """The fingerprint saved in the folder, or None if the folder holds no store yet.

        Raises
        ------
        InputError
            If what the folder holds is unreadable or not a store of this version.
        """
        if not (self.folder.exists() or self.folder.is_symlink()):
            return None
        if not self.folder.is_dir():
            raise self.not_a_store(f"{STORE_FOLDER} is not a folder")
        if not (self.settings_path.exists() or self.settings_path.is_symlink()):
            if self.records_folder.is_dir() and any(self.records_folder.glob("*.json")):
                raise self.not_a_store(f"it has records but no {SETTINGS_FILE}")
            return None  # stopped before its settings were written: nothing to keep
        data = read_json(self.settings_path)
        if data is None or not well_formed_fingerprint(data):
            raise self.not_a_store(f"{SETTINGS_FILE} is unreadable or of another layout")
        return data

    def check_records_folder(self) -> None:
        """The records folder, if present, is a folder."""
        if (self.records_folder.exists() or self.records_folder.is_symlink()) and \
                not self.records_folder.is_dir():
            raise self.not_a_store(f"{STORE_FOLDER}/{RECORDS_FOLDER} is not a folder")

    def not_a_store(self, reason: str) -> InputError:
        """The one-line refusal of a folder that holds no store of this version."""
        return InputError(f"holds a {STORE_FOLDER} folder that is not a resume store of this "
                          f"driftscreen version ({reason})", file=str(self.out),
                          place=mention("out", named=True),
                          fix=f"give a new {mention('out')} folder, or remove {self.folder} to "
                              "start afresh")

    def save(self, name: str, outcome: Mapping[str, Any]) -> Path:
        """Write the record of finished dataset ``name`` atomically."""
        record = {"settings": self.key, "name": name, "outcome": dict(outcome)}
        return atomic_write_text(self.records_folder / record_file_name(name),
                                 json.dumps(record, allow_nan=False) + "\n")

    def finished(self) -> dict[str, dict[str, Any]]:
        """Outcomes of the finished datasets by name (records of other settings ignored)."""
        outcomes: dict[str, dict[str, Any]] = {}
        if not self.records_folder.is_dir():
            return outcomes
        for path in sorted(self.records_folder.glob("*.json")):
            record = read_json(path)
            if not well_formed_record(record):
                raise self.not_a_store(f"the record {path.name} is unreadable or of another "
                                       "layout")
            if record["settings"] == self.key and path.name == record_file_name(record["name"]):
                outcomes[record["name"]] = record["outcome"]
        return outcomes


def read_json(path: Path) -> Any:
    """The JSON value of a UTF-8 file, or None if it cannot be read as such."""
    try:
        return json.loads(path.read_bytes().decode("utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, RecursionError):
        return None


def well_formed_fingerprint(data: Any) -> bool:
    """True if ``data`` has the layout :func:`settings_fingerprint` writes, in this version."""
    if not isinstance(data, dict) or data.get("store_format") != STORE_FORMAT:
        return False
    inputs = data.get("inputs")
    if not isinstance(inputs, dict) or not isinstance(data.get("intake"), dict):
        return False
    if not all(isinstance(entry, dict) and isinstance(entry.get("sha256"), str)
               and isinstance(entry.get("path", ""), str) for entry in inputs.values()):
        return False
    statistics = data.get("statistics")
    return (all(type(data.get(key)) is int for key in ("replicates", "groupings", "seed"))
            and isinstance(statistics, list) and all(isinstance(s, str) for s in statistics))


def well_formed_record(record: Any) -> bool:
    """True if ``record`` has the layout :meth:`ResultStore.save` writes."""
    return (isinstance(record, dict) and isinstance(record.get("settings"), str)
            and isinstance(record.get("name"), str) and isinstance(record.get("outcome"), dict))
