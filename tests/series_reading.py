"""The time series of a results folder read as the documentation tells a user to (pandas and
NumPy only, none of dihedra's readers): one column per torsion, for comparisons in tests."""
import json
import os

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

VALUES = {"states": ("state_codes", np.int8), "cores": ("core_bits", None), "angles": ("angles_deg", "<f4")}


def read_wide(folder, kind="states", columns=None):
    """``<kind>.parquet`` of ``folder`` as a DataFrame: the index columns, then one per torsion."""
    path = os.path.join(folder, f"{kind}.parquet")
    table = pd.read_parquet(path)
    name, dtype = VALUES[kind]
    first = os.path.join(path, sorted(os.listdir(path))[0])
    labels = json.loads(pq.read_schema(first).metadata[b"dihedra.torsions"])
    raw = np.frombuffer(b"".join(table[name]), dtype=np.uint8).reshape(len(table), -1)
    if dtype is None:
        values = np.unpackbits(raw, axis=1, count=len(labels), bitorder="little").astype(bool)
    else:
        values = raw[:, :len(labels) * np.dtype(dtype).itemsize].view(dtype)
    wide = pd.DataFrame(values, columns=labels)
    out = pd.concat([table.drop(columns=[name]).reset_index(drop=True), wide], axis=1)
    return out if columns is None else out[columns]
