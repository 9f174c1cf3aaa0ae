"""Subject records: add, edit, retire and list animals, every change logged.

Rule: an animal's record holds what a shared data file needs to say about the
subject (SUBJECT_FIELDS: lab id, cohort, species as a binomial name or an
NCBI taxonomy link, sex F/M/U/O as NWB codes it, date of birth or an age in
days stated on a date, strain, genotype, supplier, baseline weight and its
date, notes). `add_animal` refuses a name already added or holding any subject
field (an animal first seen in a session file is a bare row and may be added
over); `edit_animal` changes only the fields given; `retire_animal` marks an
animal out of training. Each change writes one `animal_changes` row per field
(old -> new as text, who, when, in this PC's time zone with its offset), in
the caller's transaction; fields set elsewhere (records.ensure_animal: the care
baseline, the demo) are logged the same way. Bad values raise `RecordError`
naming the field.
"""

from __future__ import annotations

import re
import sqlite3
import time
from datetime import date
from typing import Any

from monitor.store.registry import SEXES, RecordError, iso_local

SUBJECT_FIELDS = ("lab_id", "cohort", "species", "sex", "date_of_birth", "age_days", "age_date", "strain",
                  "genotype", "supplier", "baseline_weight_g", "baseline_weight_date", "notes")
# What a data file must say about a subject, besides its age (date of birth or age in days).
REQUIRED = ("species", "sex", "strain", "genotype")
_AGE = ("date_of_birth", "age_days")
_BINOMIAL = re.compile(r"^[A-Z][a-z]+ [a-z]+( [a-z]+)?$")
_TAXON = re.compile(r"^https?://purl\.obolibrary\.org/obo/NCBITaxon_\d+$")
_COLUMNS = ", ".join(("id", "name", *SUBJECT_FIELDS, "retired_at", "retired_reason"))


def _check(fields: dict[str, Any]) -> dict[str, Any]:
    """Validated values ("" clears a field to None); unknown fields refused."""
    unknown = set(fields) - set(SUBJECT_FIELDS)
    if unknown:
        raise RecordError(f"{sorted(unknown)[0]}: not a subject field (known: {', '.join(SUBJECT_FIELDS)})")
    out: dict[str, Any] = {}
    for key, value in fields.items():
        if isinstance(value, str):
            value = value.strip() or None
        out[key] = value
    species = out.get("species")
    if species is not None and not (_BINOMIAL.match(species) or _TAXON.match(species)):
        raise RecordError(f"species: expected a binomial name such as 'Rattus norvegicus' (or an NCBI taxonomy "
                          f"link), got {species!r}")
    if out.get("sex") is not None:
        out["sex"] = str(out["sex"]).upper()
        if out["sex"] not in SEXES:
            raise RecordError(f"sex: expected one of {', '.join(SEXES)}, got {fields['sex']!r}")
    for key in ("date_of_birth", "age_date", "baseline_weight_date"):
        if out.get(key) is not None:
            try:
                day = date.fromisoformat(out[key])
            except (TypeError, ValueError):
                raise RecordError(f"{key}: expected an ISO date YYYY-MM-DD, got {out[key]!r}") from None
            if day > date.today():
                raise RecordError(f"{key}: {out[key]} is in the future")
    weight = out.get("baseline_weight_g")
    if weight is not None and not (isinstance(weight, (int, float)) and 0 < weight < 10_000):
        raise RecordError(f"baseline_weight_g: expected grams above 0, got {weight!r}")
    age = out.get("age_days")
    if age is not None:
        if not (isinstance(age, int) and age >= 0):
            raise RecordError(f"age_days: expected whole days, 0 or more, got {age!r}")
        out.setdefault("age_date", date.today().isoformat())
    return out


def _text(value: Any) -> str | None:
    return None if value is None else (f"{value:g}" if isinstance(value, float) else str(value))


def _log(conn: sqlite3.Connection, animal_id: int, field: str, old: Any, new: Any, by: str, at: str) -> None:
    conn.execute("INSERT INTO animal_changes (animal_id, field, old, new, by, at) VALUES (?, ?, ?, ?, ?, ?)",
                 (animal_id, field, _text(old), _text(new), by, at))


def _who(by: str) -> str:
    if not isinstance(by, str) or not by.strip():
        raise RecordError("operator: who makes the change is needed")
    return by.strip()


def get_animal(conn: sqlite3.Connection, name: str) -> dict[str, Any] | None:
    """The animal's record as a dict (SUBJECT_FIELDS, id, name, retired_at, retired_reason), or None."""
    cur = conn.execute(f"SELECT {_COLUMNS} FROM animals WHERE name = ?", (name,))
    row = cur.fetchone()
    return None if row is None else dict(zip([d[0] for d in cur.description], row))


def add_animal(conn: sqlite3.Connection, name: str, by: str, **fields: Any) -> int:
    """Record a new animal with its subject fields; return its id."""
    by = _who(by)
    if not isinstance(name, str) or not name.strip() or name != name.strip():
        raise RecordError("animal: a name without leading or trailing blanks is needed")
    values = {k: v for k, v in _check(fields).items() if v is not None}
    known = get_animal(conn, name)
    at = iso_local(time.time())
    if known is not None:
        logged = conn.execute("SELECT 1 FROM animal_changes WHERE animal_id = ? AND field = 'created'",
                              (known["id"],)).fetchone()
        if logged or known["retired_at"] or any(known[k] is not None for k in SUBJECT_FIELDS):
            raise RecordError(f"animal: {name!r} is already recorded; change it with `rigside animal edit`")
        animal_id = int(known["id"])
    else:
        animal_id = int(conn.execute("INSERT INTO animals (name, created_at) VALUES (?, ?)",
                                     (name, time.time())).lastrowid)
    _log(conn, animal_id, "created", None, name, by, at)
    _write(conn, animal_id, {k: None for k in values}, values, by, at)
    return animal_id


def edit_animal(conn: sqlite3.Connection, name: str, by: str, **fields: Any) -> list[str]:
    """Change the given fields of a recorded animal; return the names of those that changed."""
    by = _who(by)
    known = get_animal(conn, name)
    if known is None:
        raise RecordError(f"animal: no animal {name!r} in the database; add it first with `rigside animal add`")
    values = _check(fields)
    if "age_days" in fields and "age_date" not in fields and values.get("age_days") is None:
        values["age_date"] = None
    changed = {k: v for k, v in values.items() if known[k] != v}
    _write(conn, int(known["id"]), known, changed, by, iso_local(time.time()))
    return list(changed)


def _write(conn: sqlite3.Connection, animal_id: int, old: dict[str, Any], new: dict[str, Any], by: str,
           at: str) -> None:
    if not new:
        return
    conn.execute(f"UPDATE animals SET {', '.join(f'{k} = ?' for k in new)} WHERE id = ?",
                 (*new.values(), animal_id))
    log_changes(conn, animal_id, old, new, by, at)


def log_changes(conn: sqlite3.Connection, animal_id: int, old: dict[str, Any], new: dict[str, Any], by: str,
                at: str | None = None) -> None:
    """One change-log row per field of `new` (old -> new), by `by`, at `at` (default now)."""
    at = at or iso_local(time.time())
    for key, value in new.items():
        _log(conn, animal_id, key, old.get(key), value, by, at)


def retire_animal(conn: sqlite3.Connection, name: str, by: str, reason: str) -> None:
    """Mark an animal out of training (its records and sessions stay)."""
    by = _who(by)
    if not reason or not reason.strip():
        raise RecordError("reason: say why the animal leaves training")
    known = get_animal(conn, name)
    if known is None:
        raise RecordError(f"animal: no animal {name!r} in the database")
    if known["retired_at"]:
        raise RecordError(f"animal: {name!r} was already retired on {known['retired_at']}")
    at = iso_local(time.time())
    conn.execute("UPDATE animals SET retired_at = ?, retired_reason = ? WHERE id = ?", (at, reason, known["id"]))
    _log(conn, int(known["id"]), "retired_at", None, at, by, at)
    _log(conn, int(known["id"]), "retired_reason", None, reason, by, at)


def list_animals(conn: sqlite3.Connection) -> list[dict[str, Any]]:
    """Every recorded animal by name, each with `sessions` (count) and `missing` (subject fields a file needs)."""
    cur = conn.execute(f"SELECT {_COLUMNS}, (SELECT count(*) FROM sessions AS s WHERE s.animal = a.name) "
                       f"FROM animals AS a ORDER BY name")
    names = [d[0] for d in cur.description[:-1]] + ["sessions"]
    out = []
    for row in cur.fetchall():
        record = dict(zip(names, row))
        record["missing"] = missing_fields(record)
        out.append(record)
    return out


def missing_fields(record: dict[str, Any] | None) -> list[str]:
    """The subject fields a shared data file needs that the record lacks (species, sex, age, strain, genotype)."""
    record = record or {}
    missing = [k for k in REQUIRED[:2] if not record.get(k)]
    if all(record.get(k) is None for k in _AGE):
        missing.append("date_of_birth or age")
    return missing + [k for k in REQUIRED[2:] if not record.get(k)]


def changes_of(conn: sqlite3.Connection, name: str) -> list[dict[str, Any]]:
    """The animal's change log, oldest first: field, old, new, by, at."""
    cur = conn.execute("SELECT c.field, c.old, c.new, c.by, c.at FROM animal_changes AS c JOIN animals AS a "
                       "ON a.id = c.animal_id WHERE a.name = ? ORDER BY c.id", (name,))
    return [dict(zip(("field", "old", "new", "by", "at"), row)) for row in cur]
