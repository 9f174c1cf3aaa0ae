"""The NWB writer against pynwb itself: the same content, built as pynwb objects and written by pynwb, gives the
same HDF5 layout (groups, datasets, types, text encodings, filters, chunks, attributes, values); pynwb's own
validator finds nothing wrong; and files written side by side in worker processes equal those written in one."""

from __future__ import annotations

import shlex
import warnings
from pathlib import Path

import numpy as np
import pytest

from mock_rig.history import cohort, write_history
from monitor.app.cli import main
from monitor.store import care_log, registry
from monitor.store.db import open_store

pynwb = pytest.importorskip("pynwb")
h5py = pytest.importorskip("h5py")


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    """Two animals x 3 days; alder with a full subject record, a check-in, a weighing, a condition, an exclusion."""
    out = tmp_path_factory.mktemp("layout")
    write_history(out / "h", cohort(2, seed=1), days=3)
    db = out / "store.sqlite3"
    for animal in ("alder", "birch"):
        assert main(["import", *map(str, sorted((out / "h").glob(f"{animal}_s*.rsw"))), "--protocol",
                     str(out / "h" / f"{animal}.protocol.toml"), "--db", str(db), "--no-fit", "--quiet"]) == 0
    for line in (out / "h" / "animals.sh").read_text().splitlines():
        words = shlex.split(line) if line.startswith("rigside ") else []
        if words[:4] == ["rigside", "animal", "add", "alder"]:
            assert main([str(db) if w == "$DB" else w for w in words[1:]]) == 0
    conn = open_store(db)
    alder = conn.execute("SELECT id FROM animals WHERE name = 'alder'").fetchone()[0]
    ids = [r[0] for r in conn.execute("SELECT id FROM sessions WHERE animal = 'alder' ORDER BY started_at")]
    conn.execute("INSERT INTO checkins (session_id, animal_id, rig, operator, weight_before_g, checked_in_at) "
                 "VALUES (?, ?, 'box1', 'Rivera, Ana', 312, 0)", (ids[0], alder))
    day = conn.execute("SELECT start_wall FROM sessions WHERE id = ?", (ids[1],)).fetchone()[0][:10]
    care_log.add_weighing(conn, "alder", at=f"{day}T18:00:00+01:00", grams=318.5, by="Kim, Bo")
    registry.add_condition(conn, ids[1], what="saline, i.p.", operator="Kim, Bo", at=f"{day}T08:00:00+01:00",
                          dose="1 ml/kg")
    registry.exclude_session(conn, ids[2], "cable fault", "Kim, Bo")
    conn.commit()
    conn.close()
    return db


def by_pynwb(content, path: Path) -> None:
    """`content` built as pynwb objects and written by pynwb (the reference)."""
    from hdmf.backends.hdf5 import H5DataIO
    from hdmf.common import DynamicTable, ElementIdentifiers, EnumData, VectorData
    from pynwb import NWBHDF5IO, NWBFile
    from pynwb.epoch import TimeIntervals
    from pynwb.event import EventsTable, TimestampVectorData
    from pynwb.file import Subject

    def table(t, kind):
        def data(values):
            return H5DataIO(values, compression="gzip", shuffle=True) if t.compressed else values
        columns = []
        for c in t.columns:
            if c.words is not None:
                words = VectorData(name=f"{c.name}_elements", description=f"the distinct values of {c.name}",
                                   data=list(c.words))
                columns += [EnumData(name=c.name, description=c.description, elements=words, data=data(c.data)),
                            words]
            elif c.resolution is not None:
                columns.append(TimestampVectorData(name=c.name, description=c.description, resolution=c.resolution,
                                                   data=data(c.data)))
            else:
                values = c.data if isinstance(c.data, np.ndarray) else list(c.data)
                columns.append(VectorData(name=c.name, description=c.description, data=data(values)))
        return kind(name=t.name, description=t.description, columns=columns,
                    id=ElementIdentifiers(name="id", data=data(np.arange(t.rows, dtype=np.int64))))

    general = dict(content.general)
    nwb = NWBFile(session_description=content.session_description, identifier=content.identifier,
                  session_start_time=content.session_start_time, subject=Subject(**content.subject), **general)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message="EnumData is experimental")
        if content.trials is not None:
            nwb.trials = table(content.trials, TimeIntervals)
        for events in content.events:
            nwb.add_events_table(table(events, EventsTable))
        for module in content.processing:
            made = nwb.create_processing_module(name=module.name, description=module.description)
            for t in module.tables:
                made.add(table(t, DynamicTable))
        with NWBHDF5IO(str(path), mode="w") as io:
            io.write(nwb)


def layout(path: Path) -> dict[str, tuple]:
    """Every object but the schema: kind, attributes (references by target), dtype, string encoding, shape,
    filters, chunks, and values (but the file's creation time and the object ids, fresh in every file)."""
    def attribute(file, value):
        if isinstance(value, h5py.Reference):
            return ("reference", file[value].name)
        if isinstance(value, np.ndarray):
            return tuple(v.decode() if isinstance(v, bytes) else v for v in value.tolist())
        return value

    def kind_of(node, name):
        t = h5py.h5a.open(node.id, name.encode()).get_type()
        return (t.get_class(), t.get_cset(), t.is_variable_str()) if t.get_class() == h5py.h5t.STRING else \
            t.get_class()

    out = {}
    with h5py.File(path, "r") as file:
        def visit(name, node):
            if name.startswith("specifications"):
                return
            attrs = {k: (attribute(file, v), kind_of(node, k)) for k, v in node.attrs.items() if k != "object_id"}
            entry = (type(node).__name__, sorted(attrs.items(), key=lambda kv: kv[0]), "object_id" in node.attrs)
            if isinstance(node, h5py.Dataset):
                value = None if name == "file_create_date" else node[()]
                if isinstance(value, np.ndarray):
                    value = value.tolist()
                entry += (str(node.dtype), h5py.check_string_dtype(node.dtype), node.shape, node.maxshape,
                          node.chunks, node.compression, node.compression_opts, node.shuffle, repr(value))
            out[name] = entry
        file.visititems(visit)
        visit("/", file)
        out["specifications"] = tuple(sorted((k, tuple(file["specifications"][k])) for k in file["specifications"]))
    return out


def test_the_writer_lays_out_what_pynwb_writes_for_the_same_content(store, tmp_path):
    from monitor.store.nwb_export import session_content
    from monitor.store.nwb_file import Column, Module, Table, write, write_schema_file

    schema = tmp_path / "schema.nwb"
    write_schema_file(schema)
    conn = open_store(store, readonly=True)
    sessions = conn.execute("SELECT id, animal FROM sessions ORDER BY animal, started_at").fetchall()
    compared = 0
    for number, (session_id, animal) in enumerate(sessions[:4], start=1):
        _, content = session_content(conn, session_id, number, {"institution": "University of Somewhere",
                                                                "lab": "Timing Lab"})
        if number == 1:  # a processing module with a small uncompressed plain table, as the manipulations table is
            content.processing.append(Module("behavior", "session-level annotations", [Table(
                "manipulations", "DynamicTable", "a few rows", [
                    Column("seq", "entry", np.array([1, 2], dtype=np.int64)),
                    Column("what", "what", ["muscimol, M1", "saline \"sham\""]),
                    Column("slow", "fraction", np.array([np.nan, 0.25]))], 2, compressed=False)]))
        ours, theirs = tmp_path / f"ours-{number}.nwb", tmp_path / f"pynwb-{number}.nwb"
        write(content, ours, schema)
        by_pynwb(content, theirs)
        mine, reference = layout(ours), layout(theirs)
        assert mine.keys() == reference.keys()
        for name in reference:
            assert mine[name] == reference[name], name
        assert pynwb.validate(path=str(ours)) == []  # pynwb's validator, against the schema the file carries
        compared += 1
    conn.close()
    assert compared == 4
    # the comparison sees a difference when there is one: a text attribute written as fixed-length ASCII
    with h5py.File(tmp_path / "ours-1.nwb", "a") as file:
        node = file["intervals/trials/start_time"]
        text = node.attrs["description"]
        del node.attrs["description"]
        node.attrs.create("description", np.bytes_(text.encode()))
    assert layout(tmp_path / "ours-1.nwb")["intervals/trials/start_time"] != \
        layout(tmp_path / "pynwb-1.nwb")["intervals/trials/start_time"]


@pytest.mark.slow
def test_files_written_in_worker_processes_equal_those_written_in_one(store, tmp_path, capsys):
    from monitor.store.nwb_export import export_nwb

    conn = open_store(store, readonly=True)
    one = export_nwb(conn, tmp_path / "one", workers=1)
    two = export_nwb(conn, tmp_path / "two", workers=2)
    conn.close()
    assert [p.name for p in one.written] == [p.name for p in two.written] and len(one.written) == 6
    assert not one.failed and not two.failed and not one.interrupted
    assert sorted(p.name for p in (tmp_path / "two").iterdir()) == [p.name for p in two.written]  # no partials
    for a, b in zip(one.written, two.written):
        assert layout(a) == layout(b)


@pytest.mark.slow
def test_ctrl_c_leaves_only_whole_files_and_names_them(store, tmp_path):
    import os
    import re
    import signal
    import subprocess
    import sys
    import time

    target = tmp_path / "nwb"
    child = subprocess.Popen([sys.executable, "-m", "monitor.app", "export", "--db", str(store), "--nwb", str(target),
                              "--jobs", "2", "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                             start_new_session=True)
    deadline = time.monotonic() + 120
    while child.poll() is None and not any(target.glob("sub-*.nwb")) and time.monotonic() < deadline:
        time.sleep(0.01)
    if child.poll() is None:
        os.killpg(child.pid, signal.SIGINT)  # as a terminal's Ctrl-C: the command and its workers
    _, err = child.communicate(timeout=120)
    files = sorted(target.glob("*"))
    print("export exit", child.returncode, len(files), "files")
    assert child.returncode in (0, 130), err
    assert files and all(p.name.startswith("sub-") and p.suffix == ".nwb" for p in files)  # nothing partial
    for path in files:
        with pynwb.NWBHDF5IO(str(path), "r") as io:  # each one whole: pynwb reads it
            assert io.read().session_id
    if child.returncode == 130:
        said = re.search(r"interrupted: (\d+) of \d+ sessions exported", err)
        assert said and int(said.group(1)) == len(files), err
