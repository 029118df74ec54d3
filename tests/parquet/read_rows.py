"""Reads a tidegate state dir's row files with pyarrow, which shares no code
with tidegate, and prints what they hold as JSON: per split the row count,
and per column the present and missing counts, the sum of number columns and
the set of category values.

Usage: python3 read_rows.py ROWS_DIR [FILE ...]
With file names, only those files are read (the batches in use); without,
every *.parquet file in ROWS_DIR.
"""

import json
import pathlib
import sys

import pyarrow.compute as pc
import pyarrow.parquet as pq

rows_dir = pathlib.Path(sys.argv[1])
names = sys.argv[2:] or sorted(p.name for p in rows_dir.glob("*.parquet"))
tables = [pq.read_table(rows_dir / n) for n in names]
out = {"files": len(tables), "train": {"rows": 0, "columns": {}}, "holdout": {"rows": 0, "columns": {}}}
for t in tables:
    for split in ("train", "holdout"):
        part = t.filter(pc.equal(t["tg_split"], split))
        side = out[split]
        side["rows"] += part.num_rows
        for name in part.column_names:
            if name.startswith("tg_"):
                continue
            col = part[name]
            c = side["columns"].setdefault(name, {"present": 0, "missing": 0})
            c["present"] += len(col) - col.null_count
            c["missing"] += col.null_count
            if col.type == "float" or str(col.type) == "float":
                s = pc.sum(pc.cast(col, "double")).as_py()
                c["sum"] = c.get("sum", 0.0) + (s or 0.0)
            else:
                vals = set(v for v in col.to_pylist() if v is not None)
                c["values"] = sorted(set(c.get("values", [])) | vals)
print(json.dumps(out))
