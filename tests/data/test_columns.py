"""Column coding (runs or dictionary encoding) against pandas.factorize as the reference,
and a long export large enough to take the run-based paths, against the same data read
through the wide reader."""

import numpy as np
import pandas as pd

from graybox.data.columns import text_codes

from .util import load


def test_text_codes_reproduce_the_column():
    rng = np.random.default_rng(5)
    stamps = np.repeat([f"2026-01-01T00:{m:02d}:{s:02d}Z" for m in range(60) for s in range(60)], 5)
    runs = pd.Series(stamps, dtype="str")
    mixed = pd.Series(rng.choice(["TI_1", "QI_2", "FI_3 "], size=20000), dtype="str")
    for col in (runs, mixed, pd.Series(["a", "b"] * 10, dtype="str")):
        codes, values = text_codes(col)
        np.testing.assert_array_equal(values.to_numpy()[codes], col.to_numpy())
        ref_codes, _ = pd.factorize(col)
        # a code stands for one value, and first rows come in increasing order
        first = [int(np.argmax(codes == k)) for k in range(len(values))]
        assert first == sorted(first)
        assert len(values) >= ref_codes.max() + 1


def test_large_long_export_sorted_by_tag_blocks(tmp_path):
    n = 6000
    t = pd.Timestamp("2026-01-01T00:00Z") + pd.to_timedelta(np.arange(n) * 10, unit="s")
    stamps = t.strftime("%Y-%m-%dT%H:%M:%SZ")
    vals = {"TI_101": 20 + np.arange(n) % 7 * 0.5, "QI_7": 1 + np.arange(n) % 3, "FI_3": 3600 + np.arange(n) % 5}
    q = np.where(np.arange(n) % 1000 == 7, "Bad", "Good")
    blocks = [pd.DataFrame({"time": stamps, "tag": k, "value": v, "q": q}) for k, v in vals.items()]
    # two blocks per tag (e.g. two exports concatenated), times interleaved across the blocks
    half = n // 2
    long = pd.concat([b.iloc[:half] for b in blocks] + [b.iloc[half:] for b in blocks])
    long.to_csv(tmp_path / "l.csv", index=False)
    wide = pd.DataFrame({"time": stamps, **vals, "q": q})
    wide.to_csv(tmp_path / "w.csv", index=False)
    tags = {"T": {"tag": "TI_101", "units": "degC", "temperature": "reading"}, "Q": "QI_7", "F": "FI_3"}
    rec_l, rep_l = load(tmp_path, {"files": ["l.csv"], "layout": "long", "time_column": "time",
                                   "quality_column": "q", "tags": tags})
    wtags = {k: (dict(v, quality_column="q") if isinstance(v, dict) else {"tag": v, "quality_column": "q"})
             for k, v in tags.items()}
    rec_w, rep_w = load(tmp_path, {"files": ["w.csv"], "time_column": "time", "tags": wtags})
    for name in ("Q", "F"):
        np.testing.assert_array_equal(rec_l.inputs[name].t, rec_w.inputs[name].t)
        np.testing.assert_array_equal(rec_l.inputs[name].values, rec_w.inputs[name].values)
    np.testing.assert_array_equal(rec_l.outputs["T"].mask, rec_w.outputs["T"].mask)
    np.testing.assert_array_equal(rec_l.outputs["T"].values, rec_w.outputs["T"].values)
    assert rep_l.tag("T").masked == rep_w.tag("T").masked == {"bad quality flag": 6}
