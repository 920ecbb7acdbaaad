"""Column coding (runs or dictionary encoding) against pandas.factorize as the reference,
and a long export large enough to take the run-based paths, against the same data read
through the wide reader."""

import numpy as np
import pandas as pd
import pyarrow as pa

from graybox.data import SymbolInfo
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


# -- fast paths against their general ones ---------------------------------------------------
ISO_SPELLINGS = [
    "2026-01-01T00:00:00+01:00", "2026-01-01 00:00:00+0100", "2026-01-01T00:00:00Z",
    "2026-07-15T23:59:59.123456789-05:30", "2026-01-01T00:00+01:00", "2026-01-01T00:00:00+01",
    "2026-03-29T01:30:00+00:00", "2026-10-25T02:30:00+02:00", "2026-10-25T02:30:00+01:00",
    "2024-02-29T12:00:00.5+14:00", "2026-12-31T23:59:59.999-12:00",
]


def test_arrow_iso_parse_agrees_with_pandas():
    """Reference: pandas' ISO 8601 parser (``to_datetime(format="ISO8601", utc=True)``), the
    general path the arrow fast path must reproduce to the nanosecond."""
    from graybox.data.timestamps import _iso_fast

    text = pd.Series(ISO_SPELLINGS * 3, dtype="str")
    ref = pd.DatetimeIndex(pd.to_datetime(text, format="ISO8601", utc=True)).as_unit("ns").asi8
    np.testing.assert_array_equal(_iso_fast(text), ref)


def test_arrow_iso_parse_refuses_what_it_must_leave_to_the_general_path():
    from graybox.data.timestamps import _iso_fast

    # no offset (never a guessed zone), a decimal comma, surrounding blanks, not a date
    for bad in ("2026-01-01T00:00:00", "2026-01-01T00:00:00,5+01:00", " 2026-01-01T00:00:00Z ", "soon"):
        assert _iso_fast(pd.Series(ISO_SPELLINGS + [bad], dtype="str")) is None


def test_iso_stamps_with_comma_and_blanks_still_load(tmp_path):
    """Stamps the fast path refuses go through the general one and give the same instants."""
    rows = ["time,T"] + [f'" 2026-01-01T00:00:{s:02d},5+01:00 ",{20 + s}' for s in range(5)]
    (tmp_path / "c.csv").write_text("\n".join(rows) + "\n")
    rec, _ = load(tmp_path, {"files": ["c.csv"], "time_column": "time", "tags": {"T": "T"}},
                  symbols={"T": SymbolInfo("T", "output", "K")})
    np.testing.assert_allclose(rec.outputs["T"].t, np.arange(5.0))
    assert rec.start_utc.isoformat() == "2025-12-31T23:00:00.500000+00:00"


def test_tag_lookup_fast_path_matches_the_general_coding():
    """When every row holds a wanted tag they are looked up in the wanted list; otherwise
    every distinct text is coded.  Both must give the same rows per tag name."""
    from graybox.data.readers import _tag_codes

    rng = np.random.default_rng(3)
    col = pd.Series(rng.choice(["TI_1", "FI_2", "QI_3"], size=50_000), dtype="str")
    fast_codes, fast_names = _tag_codes(col, {"QI_3": None, "TI_1": None, "FI_2": None, "XX_9": None})
    slow_codes, slow_names = _tag_codes(col, {})
    assert sorted(fast_names) == sorted(slow_names) == ["FI_2", "QI_3", "TI_1"]
    for name in fast_names:
        np.testing.assert_array_equal(np.flatnonzero(fast_codes == fast_names.index(name)),
                                      np.flatnonzero(slow_codes == slow_names.index(name)))
    # a tag the config does not want, or one written with a trailing blank: the general path
    odd = pd.concat([col, pd.Series(["TI_1 ", "ZZ_0"], dtype="str")], ignore_index=True)
    codes, names = _tag_codes(odd, {"TI_1": None, "FI_2": None, "QI_3": None})
    assert "ZZ_0" in names and names.count("TI_1") == 2  # stripped: merged later by name


def test_chunked_arrow_columns_code_like_one_chunk():
    # pandas' parallel CSV parse leaves text columns in several arrow chunks; the run finder
    # and its chunk-by-chunk take must give what the same column in one chunk gives
    # (reference: pyarrow's own take on the combined array, and pandas.factorize)
    import pyarrow as pa

    from graybox.data.columns import _take_sorted, text_runs

    rng = np.random.default_rng(5)
    texts = np.repeat(rng.choice(["Good", "Bad", "Uncertain"], size=3_000), rng.integers(1, 20, 3_000))
    pieces = np.array_split(texts, 7)
    chunked = pa.chunked_array([pa.array(p.tolist(), pa.string()) for p in pieces])
    col = pd.Series(pd.arrays.ArrowStringArray(chunked))
    assert col.array._pa_array.num_chunks == 7
    lengths, values = text_runs(col)
    np.testing.assert_array_equal(np.repeat(values.to_numpy(), lengths), texts)
    codes, uniq = text_codes(col)
    np.testing.assert_array_equal(uniq.to_numpy()[codes], texts)
    idx = np.sort(rng.choice(texts.size, 500, replace=False))
    assert _take_sorted(chunked, idx).to_pylist() == chunked.combine_chunks().take(pa.array(idx)).to_pylist()


def _groups_by_sort(codes, m):
    """Reference grouping: numpy's stable argsort (each code's rows in recorded order)."""
    order = np.argsort(codes, kind="stable")
    bounds = np.cumsum(np.bincount(codes + 1, minlength=m + 1))
    return [order[bounds[k]:bounds[k + 1]] for k in range(m)]


def test_periodic_tag_grouping_equals_the_sort():
    # a long export sorted by time with every tag at every stamp groups without a sort; the
    # reference is numpy's stable argsort (the general path), on periodic and broken patterns
    from graybox.data.readers import _grouped, _periodic, row_positions

    periodic = np.tile(np.array([2, 0, 3, 1], np.int32), 1000)
    assert _periodic(periodic, 4) is not None
    broken = periodic.copy()
    broken[[17, 18]] = broken[[18, 17]]  # two rows swapped: no longer periodic
    missing = periodic.copy()
    missing[5] = -1  # a row of an unwanted tag
    for codes in (periodic, broken, missing, periodic[:-1]):
        want = _groups_by_sort(codes, 4)
        for got in (_grouped(codes, 4), _periodic(codes, 4)):
            if got is None:  # not a cycle: only the sort applies
                continue
            assert len(got) == len(want) == 4
            for g, w in zip(got, want):
                np.testing.assert_array_equal(row_positions(g), w)
    assert _periodic(broken, 4) is None and _periodic(missing, 4) is None and _periodic(periodic[:-1], 4) is None


def _chunked_text(texts, cuts, large=True):
    pieces = np.split(np.asarray(texts, dtype=object), cuts)
    kind = pa.large_string() if large else pa.string()
    return pd.Series(pd.arrays.ArrowStringArray(pa.chunked_array([pa.array(list(p), kind) for p in pieces])))


def test_periodic_texts_on_chunked_buffers():
    # the buffer check against pyarrow's dictionary encoding (the general path): row r must hold
    # the text of row r % p; chunk cuts fall mid-cycle, both arrow offset widths, multi-byte UTF-8
    from graybox.data.columns import periodic_texts

    period = ["TI_101", "FI_2", "PI_3003", "Zürich_4", "TI_101 "]
    texts = period * 2000 + period[:3]  # the last cycle cut short
    for large in (True, False):
        col = _chunked_text(texts, [7, 4001, 4002, 9999], large)
        assert col.array._pa_array.num_chunks == 5
        assert periodic_texts(col) == period
        enc = pa.chunked_array(col.array._pa_array).combine_chunks().dictionary_encode()
        codes = enc.indices.to_numpy()
        np.testing.assert_array_equal(codes, np.arange(len(texts)) % len(period))  # what the check asserts
    # one changed byte, one changed length, a swapped pair, a null: not periodic
    for k, bad in ((6000, "TI_102"), (11, "FI_22"), (None, None)):  # same length; longer; swap
        wrong = list(texts)
        if k is None:
            wrong[20], wrong[21] = wrong[21], wrong[20]
        else:
            wrong[k] = bad
        assert periodic_texts(_chunked_text(wrong, [7, 4001])) is None
    with_null = pd.Series(pd.arrays.ArrowStringArray(pa.chunked_array([pa.array(texts[:-1] + [None],
                                                                                 pa.large_string())])))
    assert periodic_texts(with_null) is None
    assert periodic_texts(_chunked_text(["A"] * 50, [20])) == ["A"]  # one export per tag


def test_periodic_long_file_reads_like_a_shuffled_one(tmp_path):
    # the same samples in a cycling long table (fast path) and with its rows shuffled within
    # each stamp (general path) give identical tag data; reference: the general path itself
    from graybox.data.readers import read_table, row_positions
    from graybox.data.spec import ReadOptions

    rng = np.random.default_rng(3)
    n, tags = 3000, ["A_1", "B_22", "C_333"]
    stamps = np.repeat(pd.date_range("2026-03-01", periods=n, freq="10s", tz="UTC").strftime("%Y-%m-%dT%H:%M:%SZ"), 3)
    frame = pd.DataFrame({"time": stamps, "tag": tags * n, "value": rng.normal(size=3 * n).round(4),
                          "quality": rng.choice(["Good", "Bad"], 3 * n, p=[0.95, 0.05])})
    cyc, shuf = tmp_path / "cyc.csv", tmp_path / "shuf.csv"
    frame.to_csv(cyc, index=False)
    perm = np.concatenate([3 * i + rng.permutation(3) for i in range(n)])
    frame.iloc[perm].to_csv(shuf, index=False)
    opts = ReadOptions(file_format=None, layout="long", delimiter=",", decimal=".", encoding="utf-8", header_row=1,
                       skip_after_header=0, no_value=(), sheet=None, tag_column="tag", value_column="value",
                       quality_column="quality")
    wanted = dict.fromkeys(tags)
    a = read_table(cyc, opts, "time", wanted, True)
    b = read_table(shuf, opts, "time", wanted, True)
    assert isinstance(a.tags["A_1"].rows, slice) and isinstance(b.tags["A_1"].rows, np.ndarray)
    for tag in tags:
        ra, rb = a.tags[tag], b.tags[tag]
        np.testing.assert_array_equal(ra.values, rb.values)
        np.testing.assert_array_equal(ra.quality, rb.quality)
        np.testing.assert_array_equal(a.time.to_numpy()[row_positions(ra.rows)], b.time.to_numpy()[rb.rows])
