"""Reads every stage table of a finished run as an analyst would: Parquet
with pyarrow, CSV with pandas. Prints one line per problem found, and a
last line `tables N` with the number of tables read. Used by
tests/suite/stages/conventions.rs; the conventions are in DEVELOPERS.md,
"Table formats"."""

import sys
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq

# Columns that hold times: timestamps with a time zone in Parquet, ISO 8601
# with an offset in CSV.
TIMES = {("epochs", "captures"): ["time"], ("epochs", "spans"): ["start"]}
# Names that shadow an attribute or method of a pandas DataFrame, so that
# `df.name` would not give the column.
PANDAS_ATTRIBUTES = set(dir(pd.DataFrame))

def _is_number(text):
    try:
        float(text)
        return True
    except ValueError:
        return False


results = Path(sys.argv[1])
count = 0
for parquet in sorted(results.glob("*/*.parquet")):
    stage, stem = parquet.parent.name, parquet.stem
    where = f"{stage}/{stem}"
    table = pq.read_table(parquet)
    frame = pd.read_csv(parquet.with_suffix(".csv"), keep_default_na=False, na_values=[""])
    count += 1
    if list(frame.columns) != table.column_names:
        print(f"{where}: the CSV's columns differ from the Parquet's")
    for name in table.column_names:
        column = table.column(name)
        kind = column.type
        if name in PANDAS_ATTRIBUTES:
            print(f"{where}: column `{name}` shadows a pandas DataFrame attribute")
        if pa.types.is_floating(kind):
            nans = pc.sum(pc.is_nan(column)).as_py() or 0
            if nans:
                print(f"{where}: `{name}` holds {nans} NaN (missing values must be null)")
        if pa.types.is_string(kind) or pa.types.is_large_string(kind):
            cells = set(column.drop_null().to_pylist())
            if cells & {"NaN", "nan", "NA", "null", "None"}:
                print(f"{where}: `{name}` spells a missing value as text")
            if cells and all(_is_number(c) for c in cells) and name not in ("subject", "session", "segment", "epoch"):
                print(f"{where}: `{name}` holds only numbers but is text")
        csv_kind = frame[name].dtype
        if pa.types.is_floating(kind) or pa.types.is_integer(kind):
            if not pd.api.types.is_numeric_dtype(csv_kind) and frame[name].notna().any():
                print(f"{where}: `{name}` is a number in Parquet but pandas reads the CSV as {csv_kind}")
    for name in TIMES.get((stage, stem), []):
        kind = table.schema.field(name).type
        if not (pa.types.is_timestamp(kind) and kind.tz):
            print(f"{where}: `{name}` is {kind}, not a timestamp with a time zone")
            continue
        parsed = pd.to_datetime(frame[name], format="ISO8601", utc=True)
        if parsed.isna().any():
            print(f"{where}: `{name}` in the CSV is not ISO 8601 throughout")
        elif not (parsed.dt.as_unit("ms").astype("int64") == pc.cast(table.column(name), pa.int64()).to_numpy()).all():
            print(f"{where}: `{name}` differs between the CSV and the Parquet")
        if not frame[name].str.match(r".*T.*([+-]\d\d:\d\d|Z)$").all():
            print(f"{where}: `{name}` in the CSV lacks an offset")


print(f"tables {count}")
