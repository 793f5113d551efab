"""Read GPS pings in chunks (CSV or Parquet through pyarrow), never the whole file at once.

Columns: a device id, a time, and a position as x/y in a stated CRS or as
longitude/latitude (EPSG:4326). Policy:

* Times are read as written (ISO 8601, ``2025-03-05T21:30:00`` or with a
  space); a UTC offset is refused, because geoexp does not convert clocks and
  visit logs, pings and trial dates must all be on the same local clock.
  A Parquet timestamp column without a time zone is used as it is.
* An empty or unreadable time, or an empty device id, is an error naming the
  rows; so is a position that is not a number (pyarrow's message names the
  row). An empty position, or a longitude/latitude out of range, is not an
  error: the ping is counted as "no position" and never snapped.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyproj

from geoexp.errors import CRSError, InputError, describe_rows

_CSV = {".csv": ",", ".txt": ",", ".tsv": "\t"}
_PARQUET = {".parquet", ".pq"}
_BYTES_PER_ROW = 64  # rough size of a CSV ping line, to turn rows per chunk into a block size


def _columns(device, time, x, y, lon, lat) -> tuple[list[str], str, str]:
    if (x is None) != (y is None) or (lon is None) != (lat is None):
        raise InputError("give both x= and y= (or both lon= and lat=) for the ping positions")
    if (x is None) == (lon is None):
        raise InputError("give the ping positions as x=/y= (with crs=) or as lon=/lat=")
    cx, cy = (x, y) if x is not None else (lon, lat)
    return [device, time, cx, cy], cx, cy


def _batches(path: Path, columns: list[str], chunk_rows: int) -> tuple[Iterator, str]:
    suffix = path.suffix.lower()
    if not path.exists():
        raise InputError(f"the pings file '{path}' does not exist")
    try:
        if suffix in _CSV:
            from pyarrow import csv

            header = csv.open_csv(
                path, parse_options=csv.ParseOptions(delimiter=_CSV[suffix])
            ).schema.names
            _require(header, columns, path)
            reader = csv.open_csv(
                path,
                read_options=csv.ReadOptions(block_size=max(1 << 16, chunk_rows * _BYTES_PER_ROW)),
                parse_options=csv.ParseOptions(delimiter=_CSV[suffix]),
                convert_options=csv.ConvertOptions(
                    include_columns=columns,
                    column_types={
                        columns[0]: pa.string(),
                        columns[1]: pa.string(),
                        columns[2]: pa.float64(),
                        columns[3]: pa.float64(),
                    },
                ),
            )
            return iter(reader), "line"
        if suffix in _PARQUET:
            import pyarrow.parquet as pq

            handle = pq.ParquetFile(path)
            _require(handle.schema_arrow.names, columns, path)
            return handle.iter_batches(batch_size=chunk_rows, columns=columns), "row"
    except (pa.ArrowInvalid, OSError) as err:
        raise InputError(f"could not read the pings file '{path}': {err}") from err
    raise InputError(
        f"the pings file '{path}' must be a CSV (.csv, .txt, .tsv) or Parquet (.parquet) file"
    )


def _require(names, columns, path):
    missing = [c for c in dict.fromkeys(columns) if c not in names]
    if missing:
        raise InputError(
            f"the pings file '{path}' has no column {', '.join(map(repr, missing))}; its columns "
            f"are {', '.join(map(repr, names))}"
        )


def _times(column: pa.Array, name: str, rows: np.ndarray, word: str, path) -> np.ndarray:
    where = f"column {name!r} of the pings file '{path}'"
    if pa.types.is_timestamp(column.type):
        if column.type.tz is not None:
            raise InputError(f"{where} holds times with a time zone; give local clock times")
        values = column.cast(pa.timestamp("s"), safe=False)
    elif pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        try:
            values = pc.cast(column, pa.timestamp("s"))
        except pa.ArrowInvalid:
            bad = [
                i for i, v in enumerate(column.to_pylist()) if v is not None and not _reads(v)
            ]  # only after a failure: names the rows
            raise InputError(
                f"{where} has times that cannot be read at {word}s "
                f"{describe_rows(rows[bad].tolist())} (e.g. {column[bad[0]].as_py()!r}); write "
                "them as ISO 8601 local times such as 2025-03-05T21:30:00, without a UTC offset"
            ) from None
    else:
        raise InputError(f"{where} must hold date-times, not {column.type}")
    missing = np.flatnonzero(values.is_null().to_numpy(zero_copy_only=False))
    if len(missing):
        raise InputError(f"{where} is empty at {word}s {describe_rows(rows[missing].tolist())}")
    return values.to_numpy(zero_copy_only=False).astype("datetime64[s]").astype(np.int64)


def _reads(text: str) -> bool:
    try:
        pc.cast(pa.array([text]), pa.timestamp("s"))
    except pa.ArrowInvalid:
        return False
    return True


def read_ping_chunks(
    pings: str | os.PathLike,
    target_crs: pyproj.CRS,
    *,
    device: str,
    time: str,
    x: str | None,
    y: str | None,
    lon: str | None,
    lat: str | None,
    crs: object,
    chunk_rows: int,
) -> Iterator[dict[str, np.ndarray]]:
    """Yield chunks of pings as arrays: device_code (int64 index into device_names, the chunk's
    distinct device ids), t (seconds), x, y (units' CRS), row."""
    path = Path(pings)
    columns, cx, cy = _columns(device, time, x, y, lon, lat)
    if x is not None:
        if crs is None:
            raise CRSError(
                f"the pings '{path}' give x/y in columns {x!r}/{y!r} but no CRS; geoexp does not "
                "guess one: pass crs= (or use lon=/lat= for longitude/latitude)"
            )
        source = pyproj.CRS.from_user_input(crs)
    else:
        source = pyproj.CRS(4326)
    transform = None
    if not source.equals(target_crs, ignore_axis_order=True):
        transform = pyproj.Transformer.from_crs(source, target_crs, always_xy=True)
    batches, word = _batches(path, columns, chunk_rows)
    offset = 0
    while True:
        try:
            batch = next(batches)
        except StopIteration:
            return
        except pa.ArrowInvalid as err:
            raise InputError(f"could not read the pings file '{path}': {err}") from err
        n = batch.num_rows
        rows = np.arange(offset, offset + n) + (2 if word == "line" else 0)
        offset += n
        dev = batch.column(device)
        if dev.null_count:
            empty = np.flatnonzero(dev.is_null().to_numpy(zero_copy_only=False))
            raise InputError(
                f"column {device!r} of the pings file '{path}' is empty at {word}s "
                f"{describe_rows(rows[empty].tolist())}"
            )
        t = _times(batch.column(time), time, rows, word, path)
        px = batch.column(cx).cast(pa.float64()).to_numpy(zero_copy_only=False)
        py = batch.column(cy).cast(pa.float64()).to_numpy(zero_copy_only=False)
        if lon is not None:
            off = ~((np.abs(px) <= 180) & (np.abs(py) <= 90))
            px, py = np.where(off, np.nan, px), np.where(off, np.nan, py)
        if transform is not None:
            px, py = transform.transform(px, py)
        # Device ids as codes into this chunk's distinct ids: a million Python strings per
        # chunk (and hashing them) cost more than the rest of the reading.
        coded = pc.dictionary_encode(dev.cast(pa.string()))
        yield {
            "device_code": coded.indices.to_numpy(zero_copy_only=False).astype(np.int64),
            "device_names": coded.dictionary.to_numpy(zero_copy_only=False),
            "t": t,
            "x": np.asarray(px, dtype=np.float64),
            "y": np.asarray(py, dtype=np.float64),
            "row": rows,
        }
