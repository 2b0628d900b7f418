"""write_table writes exactly the text of pandas' to_csv (reference library: pandas)."""

import numpy as np
import pandas as pd
import pytest

from dihedra.resultsdir import write_table


@pytest.mark.parametrize("float_format", ["%.6g", "%.3f"])
def test_plain_tables_are_written_as_pandas_writes_them(tmp_path, float_format):
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({
        "torsion": ["C1-C2-C3-C4", 'say "hi"', "a,b", "line\nbreak", "", "x y"] * 5,
        "angle_deg": np.r_[rng.normal(0, 100, 25), [np.nan, np.inf, -np.inf, -0.0, 1e-300]],
        "weight": rng.random(30).astype(np.float32),
        "frames": rng.integers(-5, 10**12, 30),
        "flag": rng.random(30) > 0.5,
        "odd, name": np.arange(30, dtype=np.uint8),
    })
    ours = write_table(frame, tmp_path, "ours.csv", float_format=float_format)
    frame.to_csv(tmp_path / "pandas.csv", index=False, float_format=float_format)
    assert open(ours, "rb").read() == open(tmp_path / "pandas.csv", "rb").read()


def test_other_column_types_go_through_pandas(tmp_path):
    frame = pd.DataFrame({"n": pd.array([1, None, 3], dtype="Int64"), "c": pd.Categorical(["a", "b", "a"]),
                          "mixed": ["a", 1.5, None]})
    ours = write_table(frame, tmp_path, "ours.csv")
    frame.to_csv(tmp_path / "pandas.csv", index=False, float_format="%.6g")
    assert open(ours, "rb").read() == open(tmp_path / "pandas.csv", "rb").read()


def test_rows_written_in_parts_give_the_same_text(tmp_path):
    from dihedra.resultsdir import _write_plain_csv

    frame = pd.DataFrame({"state": ["anti", "gauche+", "gauche-"] * 10, "population": np.linspace(0, 1, 30)})
    assert _write_plain_csv(frame, tmp_path / "parts.csv", "%.6g", rows_per_part=7)
    frame.to_csv(tmp_path / "pandas.csv", index=False, float_format="%.6g")
    assert open(tmp_path / "parts.csv", "rb").read() == open(tmp_path / "pandas.csv", "rb").read()
