"""Output tables of a batch: columns, formats, the chunked atomic writer, the lock, writing back to a database."""

from __future__ import annotations

import json
import math
import os
import shutil

from ..errors import InputError, one_line
from ..report.files import atomic_output
from ..report.serialize import json_text


#: Columns that come before the descriptors, with their types.
ID_COLUMNS = {"index": "int", "source": "str", "db_id": "int", "status": "str", "space_group": "str",
              "space_group_number": "int", "charges_from": "str", "settings": "str"}


#: Columns that come after the descriptors: warnings raised for the structure, and timings (s).
TAIL_COLUMNS = {"notes": "str", "seconds_read": "float", "seconds_charges": "float",
                "seconds_sums": "float", "seconds_total": "float", "seconds_cpu": "float"}


#: Columns that differ between identical runs (timings: wall seconds of each stage, and the CPU
#: seconds of the worker process for the whole structure; wall above CPU means a busy machine).
TIMING_COLUMNS = ("seconds_read", "seconds_charges", "seconds_sums", "seconds_total", "seconds_cpu")


FORMATS = {".parquet": "parquet", ".pq": "parquet", ".csv": "csv", ".jsonl": "jsonl", ".ndjson": "jsonl"}


def table_columns(spectrum_length=None) -> dict:
    """Every column of the screening table with its type, in order."""
    from ..analysis.descriptors import SPECTRUM_LENGTH, column_types

    length = SPECTRUM_LENGTH if spectrum_length is None else spectrum_length
    return {**ID_COLUMNS, **column_types(length), **TAIL_COLUMNS}


def site_table_columns() -> dict:
    """Columns of the per-site table: the structure's index and source, then the site values."""
    from ..analysis.descriptors import SITE_COLUMNS

    return {"index": "int", "source": "str", **SITE_COLUMNS}


# ---------------------------------------------------------------- output
def output_format(path) -> str:
    ending = os.path.splitext(os.fspath(path))[1].lower()
    if ending not in FORMATS:
        raise InputError(f"{path}: unknown table format {ending or '(no ending)'}; use .parquet, .csv or .jsonl")
    return FORMATS[ending]


def _arrow_schema(columns):
    import pyarrow as pa

    kinds = {"int": pa.int64(), "float": pa.float64(), "str": pa.string()}
    return pa.schema([(name, kinds[kind]) for name, kind in columns.items()])


def _arrow_table(rows, columns, schema):
    """The rows as an Arrow table of ``schema``, column by column from NumPy buffers (None or a
    missing key: null).

    ``pyarrow.array`` of Python values imports pandas on first use (0.3 s of CPU, spent while the
    workers wait for their next task); buffers need nothing beyond pyarrow.
    """
    import numpy as np
    import pyarrow as pa

    n = len(rows)
    arrays = []
    for name, kind in columns.items():
        values = [row.get(name) for row in rows]
        valid = np.array([v is not None for v in values], dtype=bool)
        mask = None if valid.all() else pa.py_buffer(np.packbits(valid, bitorder="little"))
        if kind == "str":
            data = [("" if v is None else str(v)).encode("utf-8") for v in values]
            offsets = np.zeros(n + 1, dtype=np.int32)
            np.cumsum([len(b) for b in data], out=offsets[1:])
            buffers = [mask, pa.py_buffer(offsets), pa.py_buffer(b"".join(data))]
        else:
            dtype = np.int64 if kind == "int" else np.float64
            buffers = [mask, pa.py_buffer(np.array([0 if v is None else v for v in values], dtype=dtype))]
        arrays.append(pa.Array.from_buffers(schema.field(name).type, n, buffers, null_count=int(n - valid.sum())))
    return pa.Table.from_arrays(arrays, schema=schema)


def _parse_text(value, kind):
    if kind == "str":
        return "" if value is None else str(value)
    if value in (None, ""):
        return -1 if kind == "int" else math.nan
    return int(value) if kind == "int" else float(value)


class TableWriter:
    """A table on disk that grows by whole chunks, each one an atomic replacement of the file.

    Parquet: the old row groups are copied into a new file, the chunk becomes one more row group.
    CSV and JSON lines: the old file is copied and the chunk appended. Then the new file is renamed
    over the old one, so a reader (or a resumed run) always sees a complete table.
    """

    def __init__(self, path, columns):
        self.path = os.fspath(path)
        self.format = output_format(self.path)
        self.columns = dict(columns)
        self.rows_written = 0
        self.fresh = False    # the next append replaces the file instead of extending it
        if self.format == "parquet":
            try:
                import pyarrow  # noqa: F401
            except ImportError:
                raise InputError("writing Parquet needs pyarrow: pip install pyarrow") from None
        folder = os.path.dirname(os.path.abspath(self.path))
        if not os.path.isdir(folder):
            raise InputError(f"{self.path}: folder {folder} does not exist")

    def load(self):
        """Import the writer of this format now (pyarrow.parquet, and pyarrow.compute that casting the
        kept row groups needs: about 0.15 s), not at the first chunks, when the workers would wait."""
        if self.format == "parquet":
            import pyarrow.compute  # noqa: F401
            import pyarrow.parquet  # noqa: F401

    # reading back (for resume)
    def read(self):
        """Every row of the table on disk as dicts (``[]`` if there is no file)."""
        if not os.path.exists(self.path):
            return []
        try:
            if self.format == "parquet":
                import pyarrow.parquet as pq

                return pq.read_table(self.path).to_pylist()
            if self.format == "csv":
                import csv

                with open(self.path, newline="", encoding="utf-8") as handle:
                    return [{k: _parse_text(v, self.columns.get(k, "str")) for k, v in row.items()}
                            for row in csv.DictReader(handle)]
            rows = []
            with open(self.path, encoding="utf-8") as handle:
                for line in handle:
                    if line.strip():
                        rows.append({k: _parse_text(v, self.columns.get(k, "str"))
                                     for k, v in json.loads(line).items()})
            return rows
        except Exception as exc:
            raise InputError(f"{self.path}: cannot read the existing table to resume ({one_line(exc)[:160]})") \
                from None

    def start(self, rows=()):
        """Begin the table with ``rows`` (an empty table if none), replacing any file there."""
        self._replace(list(rows), keep_old=False)
        self.rows_written = len(rows)

    def append(self, rows):
        if rows or self.fresh:
            self._replace(rows, keep_old=not self.fresh)
            self.fresh = False
            self.rows_written += len(rows)

    def _replace(self, rows, keep_old):
        """Write the new table to a fresh file beside the old one (``atomic_output``: created with an
        unpredictable name, never through a link) and rename it over the old one; a failed write
        (a full disk) leaves the old table as it was and no partial file."""
        old = self.path if keep_old and os.path.exists(self.path) else None
        binary = self.format == "parquet"
        if not binary:
            rows = [{name: row.get(name) for name in self.columns} for row in rows]
        with atomic_output(self.path, binary=binary) as (handle, _):
            if binary:
                import pyarrow.parquet as pq

                schema = _arrow_schema(self.columns)
                with pq.ParquetWriter(handle, schema) as writer:
                    if old is not None:
                        previous = pq.ParquetFile(old)
                        for group in range(previous.num_row_groups):
                            writer.write_table(previous.read_row_group(group).cast(schema))
                    if rows or old is None:
                        writer.write_table(_arrow_table(rows, self.columns, schema))
                return
            if old is not None:
                with open(old, encoding="utf-8", newline="") as previous:
                    shutil.copyfileobj(previous, handle)
            if self.format == "csv":
                import csv

                writer = csv.writer(handle)
                if old is None:
                    writer.writerow(list(self.columns))
                for row in rows:
                    writer.writerow(["" if isinstance(v, float) and math.isnan(v) else
                                     (repr(v) if isinstance(v, float) else v) for v in row.values()])
            else:
                for row in rows:
                    handle.write(json_text(row, non_finite="null", indent=None) + "\n")   # NaN: not defined here

    def sort_by_index(self):
        """Rewrite the table in input order (after a resumed run has appended out of order)."""
        rows = self.read()
        rows.sort(key=lambda r: (r.get("index", 0), r.get("site", 0)))
        self._replace(rows, keep_old=False)


def _write_back(database, rows):
    """Store the scalar results of database rows as key-value pairs ``madelung_<column>``."""
    import ase.db

    from ..analysis.descriptors import spectrum_columns

    skip = set(spectrum_columns(10000)) | {"index", "source", "db_id", "species_potentials_V", "formula",
                                           "reduced_formula", "notes", "ewald_matrix_note", *TIMING_COLUMNS}
    connection = ase.db.connect(database, type="db")
    with connection:
        for row in rows:
            if row.get("db_id", -1) < 0 or not row["source"].startswith(database + "@"):
                continue
            pairs = {}
            for key, value in row.items():
                if key in skip or value is None or (isinstance(value, float) and not math.isfinite(value)):
                    continue
                pairs[f"madelung_{key}"] = value if not isinstance(value, str) else value[:300]
            connection.update(int(row["db_id"]), **pairs)


class TableLock:
    """A lock file beside the table (``TABLE.lock``) held for the whole run: a second run writing
    the same table is refused instead of interleaving its rows. The lock is an advisory
    ``flock``, so the kernel drops it when a run dies (even by SIGKILL) and a stale lock file
    never blocks a resume."""

    def __init__(self, path):
        import fcntl

        self.path = os.fspath(path) + ".lock"
        try:
            self.descriptor = os.open(self.path, os.O_RDWR | os.O_CREAT | getattr(os, "O_NOFOLLOW", 0), 0o644)
        except OSError as exc:
            raise InputError(f"{self.path}: cannot create the lock file of the table "
                             f"({exc.strerror or exc})") from None
        try:
            fcntl.flock(self.descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
            same = os.fstat(self.descriptor).st_ino == os.stat(self.path).st_ino
        except OSError:
            same = False
        if not same:
            os.close(self.descriptor)
            self.descriptor = None
            raise InputError(f"{path}: another run is writing this table (lock {self.path}); wait for it to end")

    def release(self):
        if self.descriptor is None:
            return
        try:
            os.unlink(self.path)
        except OSError:
            pass
        os.close(self.descriptor)
        self.descriptor = None
