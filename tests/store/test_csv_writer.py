"""The results tables' CSV writer gives pandas' bytes.

``impact.store.results.write_csv`` formats plain columns itself (about three times faster on large
members tables); pandas' ``DataFrame.to_csv(index=False, float_format="%.6g")`` is the
reference, checked on generated frames of every column kind the tables use.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from impact.store.results import FLOAT_FORMAT, csv_text, write_csv

FLOATS = st.floats(allow_nan=True, allow_infinity=True, width=64)
TEXT = st.text(alphabet=st.sampled_from(list("ab ,\"\n\r'é;-_0")), max_size=6)


@st.composite
def frames(draw):
    rows = draw(st.integers(0, 6))
    kinds = draw(st.lists(st.sampled_from(["float", "int", "bool", "text", "float32"]), min_size=2, max_size=5))
    data = {}
    for k, kind in enumerate(kinds):
        name = f"c{k}" + draw(st.sampled_from(["", ",x", ' "q"']))
        if kind == "float":
            data[name] = np.array(draw(st.lists(FLOATS, min_size=rows, max_size=rows)), dtype=float)
        elif kind == "float32":
            data[name] = np.array(draw(st.lists(st.floats(width=32, allow_nan=True), min_size=rows, max_size=rows)),
                                  dtype=np.float32)
        elif kind == "int":
            data[name] = np.array(draw(st.lists(st.integers(-2**62, 2**62), min_size=rows, max_size=rows)), dtype=np.int64)
        elif kind == "bool":
            data[name] = np.array(draw(st.lists(st.booleans(), min_size=rows, max_size=rows)), dtype=bool)
        else:
            data[name] = pd.Series(draw(st.lists(TEXT, min_size=rows, max_size=rows)), dtype=object)
    return pd.DataFrame(data)


@settings(max_examples=300, deadline=None)
@given(frames())
def test_plain_frames_are_written_as_pandas_writes_them(frame):
    text = csv_text(frame)
    carriage_return = any("\r" in str(v) for col in frame for v in [col, *frame[col].tolist()])
    # only texts holding a carriage return (quoted differently by Python versions) go through pandas
    assert (text is None) == carriage_return
    if text is not None:
        assert text == frame.to_csv(index=False, float_format=FLOAT_FORMAT)


def test_other_column_kinds_go_through_pandas(tmp_path):
    frame = pd.DataFrame({"when": pd.to_datetime(["2026-01-01", "2026-06-30"]), "n": [1.5, np.nan]})
    assert csv_text(frame) is None
    write_csv(frame, tmp_path / "t.csv")
    assert (tmp_path / "t.csv").read_text() == frame.to_csv(index=False, float_format=FLOAT_FORMAT)


def test_a_regime_verdict_reads_back_as_its_words(tmp_path):
    # regime_shares.csv names the remaining web in words ("equilibrium of the remaining web; cat extinct");
    # read back as a number it would print "nan" in the report's regime table
    from impact.store.results import read_table, write_csv

    row = dict(option="cats only", regime="equilibrium", verdict="equilibrium of the remaining web; cat extinct",
               extinct_species="cat", share=0.5, count=3)
    path = tmp_path / "dynamics" / "regime_shares.csv"
    path.parent.mkdir()
    write_csv(pd.DataFrame([row]), path)
    back = read_table(path)
    assert back.verdict.iloc[0] == "equilibrium of the remaining web; cat extinct"
    assert back.extinct_species.iloc[0] == "cat" and back.share.iloc[0] == 0.5
