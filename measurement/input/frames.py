"""The data of an analysis, whatever form it comes in: a file's path or bytes, or a DataFrame."""

from __future__ import annotations

import io
import os
from dataclasses import replace

import numpy as np
import pandas as pd

from samesource.errors import DataError, InputError
from samesource.input.loading import LoadedTable, load_table

DATAFRAME_NAME = "DataFrame"  # report["data"]["file"] for a frame given without a name
DATAFRAME_FORMAT = "dataframe"  # report["data"]["format"] for a frame

Data = pd.DataFrame | LoadedTable | str | os.PathLike | bytes


def read_data(data: Data, *, name: str | None = None, sheet: str | int | None = None) -> LoadedTable:
    """The data as a :class:`LoadedTable`, read by the same readers as a file of its kind."""
    if isinstance(data, LoadedTable):
        return data
    if isinstance(data, pd.DataFrame):
        return frame_table(data, name=name)
    if isinstance(data, str | os.PathLike | bytes | bytearray | memoryview):
        return load_table(data, name=name, sheet=sheet)
    raise InputError(f"data must be a pandas DataFrame, a path to a data file or its bytes, not "
                     f"{type(data).__name__}", code="bad_data", field="data")


def frame_table(frame: pd.DataFrame, *, name: str | None = None) -> LoadedTable:
    """A DataFrame read as a Parquet file of the same columns is read (numbers stay numbers,
    text stays text, categories become their labels), so a frame and a file give one analysis.

    Rows are named by the frame's index (a whole-number index, as ``df.loc`` finds them; else
    by position from 0), so "row 12" in a message is ``df.loc[12]``. Column names become text;
    a column of mixed numbers and text is read as text, as a CSV file's would be. The
    fingerprint (``sha256``) is that of the Parquet bytes written here."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    label = name or DATAFRAME_NAME
    if frame.shape[1] == 0 or frame.shape[0] == 0:
        raise DataError("the DataFrame has no rows or no columns", file=label)
    index = frame.index
    labels = (np.asarray(index, dtype=np.int64) if pd.api.types.is_integer_dtype(index.dtype) and index.is_unique
              else np.arange(len(frame), dtype=np.int64))
    df = frame.reset_index(drop=True)
    df.columns = [str(c) for c in df.columns]
    for col in df.columns[df.dtypes.eq(object).to_numpy()] if len(set(df.columns)) == df.shape[1] else []:
        s = df[col]
        if not s.map(lambda v: isinstance(v, str) or v is None or (isinstance(v, float) and v != v)).all():
            df[col] = s.map(lambda v: v if v is None or (isinstance(v, float) and v != v) else str(v))
    if len(set(df.columns)) != df.shape[1]:
        dup = next(c for c in df.columns if list(df.columns).count(c) > 1)
        raise DataError(f"the column name '{dup}' appears twice in the DataFrame; give each column its "
                        "own name", file=label, column=dup)
    try:
        buf = io.BytesIO()
        pq.write_table(pa.Table.from_pandas(df, preserve_index=False), buf)
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError) as e:
        raise DataError(f"cannot read the DataFrame ({str(e).splitlines()[0][:160]}); give each item "
                        "column numbers or answer texts", file=label) from None
    table = load_table(buf.getvalue(), name=label)  # row_numbers: positions from 1
    return replace(table, format=DATAFRAME_FORMAT, row_numbers=labels[np.asarray(table.row_numbers) - 1])
