"""Parquet files as record batches (the optional extra ``sapwood[parquet]``, pyarrow).

Records are read a batch at a time (``ParquetFile.iter_batches``), so memory stays at a
batch whatever the file's size; column types come from the file's schema (numbers stay
numbers, text stays text, timestamps are times). Dictionary-encoded columns are read as
their values. A row's ``line`` is its 1-based row number plus one, as if a header were
line 1, so messages read like those of a CSV file ("data.parquet line 1042").

Each batch carries ``position``: ``line`` (of the next unread row, header counted) and
``offset`` 0 with no ``mark``: a Parquet file is not resumed by bytes but by rows, and a
resumed reader skips whole row groups before the row it resumes at.
"""

from __future__ import annotations

from typing import BinaryIO, Callable, Iterator

import numpy as np

from stream.errors import ConfigError

from .base import RawBatch


def _pyarrow():
    try:
        import pyarrow as pa
        import pyarrow.parquet as pq
    except ImportError:
        raise ConfigError("reading Parquet needs pyarrow: pip install "
                          "\"sapwood[parquet]\"") from None
    return pa, pq


class ParquetReader:
    """Records of one Parquet file, in batches of at most ``batch_rows`` rows.

    Parameters follow the other readers: ``opener`` returns the (seekable) binary file,
    ``origin`` names it, ``resume`` is an earlier batch's position.
    """

    extensions = (".parquet", ".pq")

    def __init__(self, opener: Callable[[], BinaryIO], origin: str,
                 batch_rows: int = 65536, resume: dict | None = None,
                 known_columns: list[str] | None = None) -> None:
        pa, pq = _pyarrow()
        self.name = origin
        self._batch_rows = int(batch_rows)
        self._skip = int(resume["line"]) - 2 if resume else 0
        try:
            self._file = pq.ParquetFile(opener())
        except (pa.ArrowException, OSError) as exc:
            raise ConfigError(f"{origin!r} is not a readable Parquet file: {exc}") from None
        self._pa = pa
        self.columns = list(self._file.schema_arrow.names)

    def close(self) -> None:
        self._file.close()

    def batches(self) -> Iterator[RawBatch]:
        pa = self._pa
        meta = self._file.metadata
        skip, groups = self._skip, []
        for g in range(meta.num_row_groups):
            rows = meta.row_group(g).num_rows
            if skip >= rows:
                skip -= rows
            else:
                groups.append(g)
        row = self._skip - skip          # rows before the first group read
        if not groups:
            return
        for batch in self._file.iter_batches(batch_size=self._batch_rows,
                                             row_groups=groups, use_threads=False):
            if skip:
                cut = min(skip, batch.num_rows)
                batch, skip, row = batch.slice(cut), skip - cut, row + cut
                if batch.num_rows == 0:
                    continue
            columns = [c.dictionary_decode() if pa.types.is_dictionary(c.type) else c
                       for c in batch.columns]
            frame = pa.RecordBatch.from_arrays(columns, names=batch.schema.names).to_pandas()
            lines = np.arange(row + 2, row + 2 + len(frame), dtype=np.int64)
            row += len(frame)
            yield RawBatch(frame, self.name, lines,
                           position={"offset": 0, "line": row + 2, "mark": ""})
