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


def test_a_row_with_folders_matches_only_the_file_in_those_folders(tmp_path):
    sheet = read_sheet(
        _write(
            tmp_path,
            "file,condition\nrig1/cell01.nwb,standard\nrig2\\cell01,enriched\ncell02.nwb,other\n",
        )
    )
    assert sheet.lookup("x", "/data/day/rig1/cell01.nwb")[1]["condition"] == "standard"
    assert sheet.lookup("y", "/data/day/rig2/cell01.nwb")[1]["condition"] == "enriched"
    assert sheet.lookup("z", "/data/day/rig3/cell01.nwb") is None
    assert sheet.lookup("w", "/data/day/rig3/cell02.nwb")[1]["condition"] == "other"


def test_the_row_naming_most_of_the_path_wins(tmp_path):
    sheet = read_sheet(
        _write(tmp_path, "file,condition\ncell01.nwb,plain\n./day/rig2/cell01.nwb,rig2\n")
    )
    assert sheet.lookup("a", "/data/day/rig2/cell01.nwb")[1]["condition"] == "rig2"
    assert sheet.lookup("b", "/data/day/rig1/cell01.nwb")[1]["condition"] == "plain"
    assert sheet.lookup("c", "/data/other/rig2/cell01.nwb")[1]["condition"] == "plain"


def test_a_row_no_path_matches_falls_back_to_the_one_row_of_that_stem(tmp_path):
    # a path from another machine, a folder reached through a link, another case or extension
    sheet = read_sheet(
        _write(tmp_path, "file,condition\n/mnt/old/day1/cell01.nwb,a\nRig2/cell02.abf,b\n")
    )
    assert sheet.lookup("x", "/srv/data/day1/cell01.nwb")[1]["condition"] == "a"
    assert sheet.lookup("y", "/srv/data/rig2/cell02.nwb")[1]["condition"] == "b"
    two = read_sheet(_write(tmp_path, "file,condition\nr1/c.nwb,a\nr2/c.nwb,b\n", "two.csv"))
    assert two.lookup("z", "/d/r3/c.nwb") is None  # two rows of that stem: no guess


@pytest.mark.parametrize(
    "text",
    [
        "file,condition,animal,\ncell01.nwb,ctrl,A1,\ncell02.nwb,drug,A2,\n",  # header too
        "file,condition,animal\ncell01.nwb,ctrl,A1,\ncell02.nwb,drug,A2,,\n",  # rows only
    ],
)
def test_trailing_separators_keep_every_column_in_place(tmp_path, text):
    # a spreadsheet export's trailing commas made pandas take the first column as the index:
    # no row was joined (or a false "appears twice" stopped the run)
    sheet = read_sheet(_write(tmp_path, text))
    assert sheet.columns == ("condition", "animal")
    assert sheet.lookup("cell02", "/day/cell02.nwb")[1] == {"condition": "drug", "animal": "A2"}


def test_a_value_past_the_header_stops_the_run_naming_the_row(tmp_path):
    with pytest.raises(SheetError, match=r"row 3 has 4 fields but the header names 3 .*'x'"):
        read_sheet(_write(tmp_path, "file,condition,animal\ncell01.nwb,ctrl,A1\nc2,drug,A2,x\n"))
    with pytest.raises(SheetError, match=r"row 2 has a value \('x'\) in column 3, which has no"):
        read_sheet(_write(tmp_path, "file,condition,\ncell01.nwb,ctrl,x\n"))


@pytest.mark.parametrize(
    ("first", "second"),
    [("./cell01.nwb", "cell01.nwb"), ("Cell01.nwb", "cell01.NWB"), ("rig1//c.nwb", "rig1/c.nwb")],
)
def test_one_file_spelled_two_ways_is_a_duplicate(tmp_path, first, second):
    # the first spelling silently won (or neither row was joined) and the other was reported
    # as matching no file
    text = f"file,condition\n{first},ctrl\n{second},drug\n"
    with pytest.raises(SheetError, match=r"name the same file \(rows 2 and 3\)"):
        read_sheet(_write(tmp_path, text))


def test_a_line_of_spaces_is_blank_and_a_space_separated_sheet_reads(tmp_path):
    sheet = read_sheet(_write(tmp_path, "file,condition\ncell01.nwb,ctrl\n   \n"))
    assert len(sheet.rows) == 1
    sheet = read_sheet(_write(tmp_path, "file condition\ncell01.nwb ctrl\ncell02.nwb drug\n"))
    assert sheet.lookup("cell02", "/d/cell02.nwb")[1] == {"condition": "drug"}
