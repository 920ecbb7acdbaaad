"""Bad input: each case gets a clear error that names the file and the line, column or tag,
and says what to do.  Errors are graybox's own (ConfigError, DataError), never a traceback
from a library."""

import pandas as pd
import pytest

from graybox.errors import ConfigError, DataError

from .util import check, load, write

TAGS = {"T": {"tag": "TI_101", "units": "degC", "temperature": "reading"}, "Q": "QI_7", "F": "FI_3"}
HEADER = "time,TI_101,QI_7,FI_3\n"
GOOD = "2026-01-05T00:00:00Z,50,1,1\n2026-01-05T00:01:00Z,51,1,1\n"


def table(**kw):
    return dict({"files": ["a.csv"], "time_column": "time", "tags": TAGS}, **kw)


def error_text(tmp_path, tbl, exc=DataError):
    with pytest.raises(exc) as info:
        load(tmp_path, tbl)
    return str(info.value)


def test_empty_file(tmp_path):
    path = write(tmp_path, "a.csv", "")
    text = error_text(tmp_path, table())
    assert str(path) in text and "empty" in text and "hint:" in text


def test_header_only(tmp_path):
    path = write(tmp_path, "a.csv", HEADER)
    text = error_text(tmp_path, table())
    assert str(path) in text and "header but no data rows" in text


def test_header_only_excel(tmp_path):
    import openpyxl

    wb = openpyxl.Workbook()
    wb.active.append(["time", "TI_101", "QI_7", "FI_3"])
    wb.save(tmp_path / "a.xlsx")
    text = error_text(tmp_path, table(files=["a.xlsx"]))
    assert "a.xlsx" in text and "no data rows" in text


def test_tag_missing_from_file_suggests_close_matches(tmp_path):
    path = write(tmp_path, "a.csv", "time,TI_101,QI_7,FI-3\n2026-01-05T00:00:00Z,50,1,1\n")
    text = error_text(tmp_path, table())
    assert "tag 'FI_3'" in text and "'F'" in text and str(path) in text
    assert "close matches: 'FI-3'" in text and "[data.tags" in text


def test_tag_missing_from_long_file_suggests_case_variant(tmp_path):
    write(tmp_path, "l.csv", "time,tag,value\n2026-01-05T00:00:00Z,TI_101,5\n2026-01-05T00:00:00Z,qi_7,1\n"
                             "2026-01-05T00:00:00Z,FI_3,1\n")
    text = error_text(tmp_path, table(files=["l.csv"], layout="long"))
    assert "tag 'QI_7'" in text and "'qi_7'" in text


def test_time_column_missing(tmp_path):
    write(tmp_path, "a.csv", "Time,TI_101,QI_7,FI_3\n2026-01-05T00:00:00Z,50,1,1\n")
    text = error_text(tmp_path, table())
    assert "no column 'time'" in text and "did you mean 'Time'" in text


def test_wrong_delimiter_is_hinted(tmp_path):
    write(tmp_path, "a.csv", "time;TI_101;QI_7;FI_3\n2026-01-05T00:00:00Z;50;1;1\n")
    text = error_text(tmp_path, table())
    assert "delimiter" in text


def test_non_numeric_value_names_the_line(tmp_path):
    path = write(tmp_path, "a.csv", HEADER + GOOD + "2026-01-05T00:02:00Z,I/O Timeout,1,1\n")
    text = error_text(tmp_path, table())
    assert f"{path} line 4 column 'TI_101'" in text and "'I/O Timeout' is not a number" in text
    assert "no_value" in text  # what to do if it means "no sample"


def test_non_numeric_value_in_long_table_names_the_line(tmp_path):
    path = write(tmp_path, "l.csv", "time,tag,value\n2026-01-05T00:00:00Z,TI_101,5\n"
                                    "2026-01-05T00:00:00Z,QI_7,1\n2026-01-05T00:01:00Z,TI_101,5..2\n"
                                    "2026-01-05T00:00:00Z,FI_3,1\n")
    text = error_text(tmp_path, table(files=["l.csv"], layout="long"))
    assert f"{path} line 4 column 'value'" in text and "'5..2'" in text


def test_listed_no_value_text_means_no_sample(tmp_path):
    write(tmp_path, "a.csv", HEADER + GOOD + "2026-01-05T00:02:00Z,I/O Timeout,1,1\n")
    rec, rep = load(tmp_path, table(no_value=["", "I/O Timeout"]))
    assert rec.outputs["T"].t.size == 2 and rep.tag("T").blank_cells == 1


def test_timestamp_that_does_not_parse(tmp_path):
    path = write(tmp_path, "a.csv", HEADER + GOOD + "2026-01-05T25:61:00Z,52,1,1\n")
    text = error_text(tmp_path, table())
    assert f"{path} line 4 column 'time'" in text and "not an ISO 8601" in text


def test_local_timestamp_that_does_not_parse(tmp_path):
    path = write(tmp_path, "a.csv", HEADER + "2026-01-05 00:00,50,1,1\nyesterday noon,51,1,1\n")
    text = error_text(tmp_path, table(time_format="local", timezone="UTC"))
    assert f"{path} line 3 column 'time'" in text and "'yesterday noon' is not a date and time" in text


def test_naive_and_aware_stamps_mixed(tmp_path):
    path = write(tmp_path, "a.csv", HEADER + GOOD + "2026-01-05 00:02:00,52,1,1\n")
    text = error_text(tmp_path, table())
    assert f"{path} line 4" in text and "line 2" in text and "mixed" in text


def test_undeclared_date_order_contradicted_by_the_data(tmp_path):
    path = write(tmp_path, "a.csv", HEADER + "05/01/2026 00:00,50,1,1\n13/01/2026 00:01,51,1,1\n")
    text = error_text(tmp_path, table(time_format="local", timezone="UTC"))
    assert f"{path} line 3" in text and "no day/month order is declared" in text
    assert "date_order = \"dmy\"" in text


def test_declared_date_order_contradicted_by_the_data(tmp_path):
    path = write(tmp_path, "a.csv", HEADER + "05/01/2026 00:00,50,1,1\n13/01/2026 00:01,51,1,1\n")
    text = error_text(tmp_path, table(time_format="local", timezone="UTC", date_order="mdy"))
    assert f"{path} line 3" in text and "month 13" in text and "\"dmy\"" in text


def test_unit_pint_does_not_know(tmp_path):
    cfg = write(tmp_path, "cfg.toml", '[data]\nfiles = ["a.csv"]\n[data.tags.T]\ntag = "TI_101"\n'
                                      'units = "degCelsius_x"\n')
    write(tmp_path, "a.csv", HEADER + GOOD)
    tags = dict(TAGS, T={"tag": "TI_101", "units": "degCelsius_x"})
    text = error_text(tmp_path, table(tags=tags), ConfigError)
    assert "'degCelsius_x' are not known to pint" in text and str(cfg) in text and "[data.tags.T] key 'units'" in text


def test_every_row_of_an_output_masked(tmp_path):
    write(tmp_path, "a.csv", HEADER + GOOD)
    tags = dict(TAGS, T={"tag": "TI_101", "units": "degC", "temperature": "reading", "valid": [60, 90]})
    text = error_text(tmp_path, table(tags=tags))
    assert "every sample of output 'T' (tag 'TI_101') is masked (2 outside valid range)" in text
    # graybox check reports it as a reason a fit cannot run, with the per-tag numbers
    rep = check(tmp_path, table(tags=tags))
    assert not rep.ok and "every sample of output 'T'" in rep.problems[0]
    assert rep.tag("T").rows_read == 2 and "a fit cannot run" in rep.summary()


def test_window_that_selects_nothing(tmp_path):
    write(tmp_path, "a.csv", HEADER + GOOD)
    text = error_text(tmp_path, table(select=[["2026-02-01T00:00Z", "2026-02-02T00:00Z"]]))
    assert "selects nothing" in text and "key 'select'" in text


def test_window_bound_that_does_not_parse(tmp_path):
    write(tmp_path, "a.csv", HEADER + GOOD)
    text = error_text(tmp_path, table(exclude=[["next tuesday", "2026-02-02T00:00Z"]]), ConfigError)
    assert "'next tuesday' is not an ISO 8601" in text and "key 'exclude'" in text


def test_missing_sheet_suggests(tmp_path):
    import openpyxl

    wb = openpyxl.Workbook()
    wb.active.title = "Trend data"
    wb.save(tmp_path / "a.xlsx")
    text = error_text(tmp_path, table(files=["a.xlsx"], sheet="Trend_data"))
    assert "no sheet 'Trend_data'" in text and "did you mean 'Trend data'" in text


def test_wrong_encoding_is_named(tmp_path):
    (tmp_path / "a.csv").write_bytes((HEADER.replace("time", "zeit_ä") + GOOD).encode("cp1252"))
    text = error_text(tmp_path, table(time_column="zeit_ä"))
    assert "not utf-8" in text.lower() and "encoding" in text


def test_parquet_missing_column(tmp_path):
    pd.DataFrame({"time": ["2026-01-05T00:00:00Z"], "TI_101": [1.0], "QI_7": [1.0]}).to_parquet(tmp_path / "a.parquet")
    text = error_text(tmp_path, table(files=["a.parquet"]))
    assert "tag 'FI_3'" in text and "a.parquet" in text
