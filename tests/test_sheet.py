"""The metadata sheet: keys, joins and the errors a hand-typed sheet produces."""

import pytest

from pipeline.sheet import SheetError, read_sheet


def _write(tmp_path, text, name="metadata.csv", encoding="utf-8"):
    path = tmp_path / name
    path.write_bytes(text.encode(encoding))
    return path


def test_lookup_by_file_name_stem_or_cell_id(tmp_path):
    sheet = read_sheet(
        _write(tmp_path, "file,condition,animal\ncell01.nwb,control,A1\ncell02,drug,A2\n")
    )
    assert sheet.columns == ("condition", "animal")
    assert sheet.lookup("cell01", "/data/day/cell01.nwb")[1] == {
        "condition": "control",
        "animal": "A1",
    }
    assert sheet.lookup("cell02", "/data/day/cell02.nix")[1]["condition"] == "drug"
    assert sheet.lookup("cell03", "/data/day/cell03.nwb") is None


def test_cell_id_match_wins(tmp_path):
    sheet = read_sheet(
        _write(tmp_path, "file,cell_id,condition\npair.nwb,,control\n,pair-e1,drug\n")
    )
    assert sheet.lookup("pair-e1", "pair.nwb")[1]["condition"] == "drug"
    assert sheet.lookup("pair-e0", "pair.nwb")[1]["condition"] == "control"


def test_missing_key_column(tmp_path):
    with pytest.raises(SheetError, match=r"metadata.csv: needs a 'file' or 'cell_id' column"):
        read_sheet(_write(tmp_path, "name,condition\na,b\n"))


def test_duplicate_ids(tmp_path):
    with pytest.raises(SheetError, match=r"file 'c1.nwb' appears twice \(rows 2 and 3\)"):
        read_sheet(_write(tmp_path, "file,condition\nc1.nwb,a\nc1.nwb,b\n"))


def test_not_utf8(tmp_path):
    with pytest.raises(SheetError, match=r"not UTF-8 text \(byte 23"):
        read_sheet(_write(tmp_path, "file,condition\nc1,contr\xf4le\n", encoding="latin-1"))


def test_missing_sheet(tmp_path):
    with pytest.raises(SheetError, match="metadata sheet not found"):
        read_sheet(tmp_path / "nope.csv")
