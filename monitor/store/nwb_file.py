"""An NWB file written straight with h5py, in the layout pynwb writes for the same content.

Rule: pynwb builds, checks and maps one Python object per file part and table
column before anything is written, about ten times the cost of the writing
itself; this module writes the same HDF5 groups, datasets and attributes
directly. Every typed object carries `neurodata_type`, `namespace` and a fresh
`object_id`; a table has `colnames`, `description` and an `id` column and
sits in `intervals/`, `events/` or a processing module (`/processing/<name>`,
a ProcessingModule with its own description); a categorical column
(EnumData) refers to its dataset of words by an object reference. Text is
variable-length UTF-8, times ISO 8601 in ASCII, as pynwb writes them. The
schema a reader needs (`/specifications`, pointed to by the root's
`.specloc`) is copied from a small file pynwb itself wrote
(`write_schema_file`, once per export), so it always matches the installed
pynwb. What goes into a file is monitor.store.nwb_export's choice; the tests
hold this layout against pynwb's reading, its validator and nwbinspector.
"""

from __future__ import annotations

import uuid
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, Sequence

import numpy as np

GZIP_LEVEL = 4  # hdmf's default; levels 1 and 9 measured: sizes within 1 %, times within the noise
HDF5_FORMAT = "v110"  # object headers of HDF5 1.10 (readable by 1.10 and later): smaller than the earliest format
CHUNK_BYTES = 4 * 1024 * 1024  # hdmf's chunk size for table columns (HDF5IO.compute_default_chunk_shape)
COMMON = "hdmf-common"
NAMESPACES = {"DynamicTable": COMMON}  # a table type's namespace when it is not NWB's core


@dataclass(frozen=True)
class Column:
    """One table column: numbers (compressed), text, or codes into `words` (a categorical column)."""

    name: str
    description: str
    data: np.ndarray | Sequence[Any]
    words: Sequence[str] | None = None
    resolution: float | None = None  # a timestamp column (TimestampVectorData, seconds)


@dataclass(frozen=True)
class Table:
    """A dynamic table: its type (TimeIntervals, EventsTable, DynamicTable), description, columns, row count,
    and whether its numbers are compressed (a table of a few rows is not)."""

    name: str
    neurodata_type: str
    description: str
    columns: Sequence[Column]
    rows: int
    compressed: bool = True


@dataclass(frozen=True)
class Module:
    """A processing module (`/processing/<name>`, pynwb's ProcessingModule): its description and its tables."""

    name: str
    description: str
    tables: Sequence[Table]


@dataclass
class Content:
    """What one NWB file holds: the file's own fields, `general/` (text or lists of text), the subject's fields,
    the trials, the events tables (under `events/`) and processing modules."""

    identifier: str
    session_description: str
    session_start_time: datetime
    general: dict[str, str | list[str]]
    subject: dict[str, Any]
    trials: Table | None = None
    events: list[Table] = field(default_factory=list)
    processing: list[Module] = field(default_factory=list)


def write_schema_file(path: Path) -> None:
    """Write a minimal NWB file with pynwb, whose `/specifications` (every namespace pynwb loaded: core,
    hdmf-common, hdmf-experimental) every written file copies."""
    from pynwb import NWBHDF5IO, NWBFile

    nwb = NWBFile(session_description="schema", identifier="schema",
                  session_start_time=datetime(2000, 1, 1).astimezone())
    with NWBHDF5IO(str(path), mode="w") as io:
        io.write(nwb)


def write(content: Content, path: Path, schema: Path) -> None:
    """Write `content` as an NWB file at `path` (which the caller renames into place)."""
    import h5py

    with h5py.File(path, "w", libver=HDF5_FORMAT) as out:
        with h5py.File(schema, "r") as source:
            source.copy(source["specifications"], out, "specifications")
            version = source.attrs["nwb_version"]
        _typed(out, "NWBFile", "core")
        _say(out, "nwb_version", version)
        out.attrs[".specloc"] = out["specifications"].ref
        for name in ("acquisition", "analysis", "processing", "stimulus/presentation", "stimulus/templates"):
            out.create_group(name)
        out.create_dataset("file_create_date", data=[_iso(datetime.now().astimezone())],
                           dtype=h5py.string_dtype("ascii"))
        _text(out, "identifier", content.identifier)
        _text(out, "session_description", content.session_description)
        for name in ("session_start_time", "timestamps_reference_time"):
            out.create_dataset(name, data=_iso(content.session_start_time), dtype=h5py.string_dtype("ascii"))
        general = out.create_group("general")
        for name, value in content.general.items():
            _text(general, name, value)
        _subject(general, content.subject)
        if content.trials is not None:
            _table(out.require_group("intervals"), content.trials)
        for table in content.events:
            _table(out.require_group("events"), table)
        for module in content.processing:
            group = _typed(out["processing"].create_group(module.name), "ProcessingModule", "core")
            _say(group, "description", module.description)
            for table in module.tables:
                _table(group, table)


def _iso(moment: datetime) -> str:
    return moment.isoformat()


def _typed(node: Any, neurodata_type: str, namespace: str) -> Any:
    _say(node, "namespace", namespace)
    _say(node, "neurodata_type", neurodata_type)
    _say(node, "object_id", str(uuid.uuid4()))
    return node


def _say(node: Any, name: str, text: str) -> None:
    """A text attribute, as h5py's `node.attrs[name] = text` makes it (a scalar variable-length UTF-8 string),
    through h5py's low-level calls: the high-level path costs several times more per attribute."""
    import h5py

    dtype = h5py.string_dtype("utf-8")
    if not _TEXT:
        _TEXT.extend((h5py.h5t.py_create(dtype, logical=True), h5py.h5t.py_create(dtype),
                      h5py.h5s.create_simple(())))
    stored, memory, space = _TEXT
    attribute = h5py.h5a.create(node.id, name.encode(), stored, space)
    attribute.write(np.array(text, dtype=dtype), mtype=memory)
    attribute.close()


_TEXT: list[Any] = []  # the attribute's stored and in-memory types and its scalar space, made once


def _text(group: Any, name: str, value: str | list[str]) -> Any:
    import h5py

    kind = h5py.string_dtype("utf-8")
    if isinstance(value, list):
        return group.create_dataset(name, data=np.array(value, dtype=kind))
    return group.create_dataset(name, data=value, dtype=kind)


def _subject(general: Any, fields: dict[str, Any]) -> None:
    import h5py

    subject = _typed(general.create_group("subject"), "Subject", "core")
    for name, value in fields.items():
        if value is None:
            continue
        if name == "date_of_birth":
            subject.create_dataset(name, data=_iso(value), dtype=h5py.string_dtype("ascii"))
            continue
        node = _text(subject, name, value)
        if name == "age":
            _say(node, "reference", "birth")


def _table(parent: Any, table: Table) -> None:
    import h5py

    group = _typed(parent.create_group(table.name), table.neurodata_type,
                   NAMESPACES.get(table.neurodata_type, "core"))
    group.attrs["colnames"] = np.array([c.name for c in table.columns], dtype=h5py.string_dtype("utf-8"))
    _say(group, "description", table.description)
    _typed(_column(group, "id", np.arange(table.rows, dtype=np.int64), table.compressed), "ElementIdentifiers",
           COMMON)
    for column in table.columns:
        if column.words is not None:
            words = _typed(_words(group, f"{column.name}_elements", column.words), "VectorData", COMMON)
            _say(words, "description", f"the distinct values of {column.name}")
            node = _typed(_data(group, column, table.compressed), "EnumData", "hdmf-experimental")
            node.attrs["elements"] = words.ref
        elif column.resolution is not None:
            node = _typed(_data(group, column, table.compressed), "TimestampVectorData", "core")
            node.attrs["resolution"] = np.float64(column.resolution)
            _say(node, "unit", "seconds")
        else:
            node = _typed(_data(group, column, table.compressed), "VectorData", COMMON)
        _say(node, "description", column.description)


def _words(group: Any, name: str, words: Sequence[str]) -> Any:
    return _column(group, name, _strings(words), False)


def _data(group: Any, column: Column, compressed: bool) -> Any:
    if isinstance(column.data, np.ndarray) and column.data.dtype.kind in "biuf":
        return _column(group, column.name, column.data, compressed)
    return _column(group, column.name, _strings(column.data), False)


def _strings(values: Sequence[Any]) -> np.ndarray:
    import h5py

    return np.array(list(values), dtype=h5py.string_dtype("utf-8"))


def _column(group: Any, name: str, values: np.ndarray, compressed: bool) -> Any:
    """A table column as hdmf writes one: extendable, in chunks of up to CHUNK_BYTES, gzip when `compressed`."""
    chunks = (max(1, min(CHUNK_BYTES // values.dtype.itemsize, len(values))),)
    filters: dict[str, Any] = {"compression": "gzip", "compression_opts": GZIP_LEVEL, "shuffle": True} \
        if compressed else {}
    return group.create_dataset(name, data=values, maxshape=(None,), chunks=chunks, **filters)
