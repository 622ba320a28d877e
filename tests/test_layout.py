"""Labels from folders and from label tables; every bad table row is named."""

from __future__ import annotations

import csv
import io

import pytest

from labelprep import layout
from labelprep.errors import InputError, ParameterError


class TestDetect:
    def test_class_folders(self):
        assert layout.detect(["cat/a.jpg", "dog/b.jpg"]) == "folders"

    def test_split_folders(self):
        assert layout.detect(["train/cat/a.jpg", "Validation/dog/b.jpg", "test/cat/c.jpg"]) == "split-folders"

    def test_table_wins(self, tmp_path):
        assert layout.detect(["train/cat/a.jpg"], labels_table=tmp_path / "t.csv") == "table"


class TestAssign:
    def test_class_folders_take_first_folder(self):
        got = layout.assign(["cat/x/a.jpg", "dog/b.jpg", "loose.jpg"], "folders")
        assert got["label"] == ["cat", "dog", ""]
        assert got["given_split"] == ["", "", ""]

    def test_split_folders_keep_the_split(self):
        got = layout.assign(["train/cat/a.jpg", "valid/dog/b.jpg", "test/cat/c.jpg"], "auto")
        assert got["label"] == ["cat", "dog", "cat"]
        assert got["given_split"] == ["train", "val", "test"]

    def test_group_pattern_first_capture(self):
        got = layout.assign(["cat/s1_a.jpg", "cat/s2_b.jpg", "cat/c.jpg"], "folders", group_pattern=r"/(s\d)_")
        assert got["group"] == ["s1", "s2", ""]

    def test_bad_pattern_and_layout_are_parameter_errors(self):
        with pytest.raises(ParameterError, match="not a valid regular expression"):
            layout.assign(["a/b.jpg"], "folders", group_pattern="(")
        with pytest.raises(ParameterError, match="layout='sideways'"):
            layout.assign(["a/b.jpg"], "sideways")


class TestTable:
    def _table(self, tmp_path, text, encoding="utf-8"):
        path = tmp_path / "labels.csv"
        path.write_bytes(text.encode(encoding))
        return path

    def test_reads_labels_and_groups(self, tmp_path):
        t = self._table(tmp_path, "path,label,group\na.jpg,cat,s1\nsub/b.jpg,dog,\n")
        got = layout.assign(["a.jpg", "sub/b.jpg", "c.jpg"], "table", labels_table=t)
        assert got["label"] == ["cat", "dog", ""]
        assert got["group"] == ["s1", "", ""]

    @pytest.mark.parametrize("text, message", [
        ("path,label\n../up.jpg,cat\n", "line 2: '../up.jpg' escapes the root"),
        ("path,label\na/../../up.jpg,cat\n", "line 2: 'a/../../up.jpg' escapes the root"),
        ("path,label\n/etc/passwd,cat\n", "line 2: '/etc/passwd' is absolute"),
        ("path,label\na.jpg,cat\na.jpg,dog\n", "line 3: 'a.jpg' is listed twice"),
        ("path,label\na.jpg,cat\nghost.jpg,dog\n", "line 3: 'ghost.jpg' does not exist"),
        ("path,label,colour\na.jpg,cat,red\n", "unknown column"),
        ("file,label\na.jpg,cat\n", "missing column"),
        ("path,label\na.jpg,cat,extra\n", "line 2: 3 fields"),
        ("", "is empty"),
    ])
    def test_bad_tables_name_the_row(self, tmp_path, text, message):
        t = self._table(tmp_path, text)
        with pytest.raises(InputError, match=message.replace("(", r"\(")):
            layout.assign(["a.jpg"], "table", labels_table=t)

    def test_wrong_encoding_is_named(self, tmp_path):
        t = self._table(tmp_path, "path,label\na.jpg,gr\u00fcn\n", encoding="latin-1")
        with pytest.raises(InputError, match="not UTF-8"):
            layout.assign(["a.jpg"], "table", labels_table=t)


class TestTablesFromAnyDesktop:
    """Tables written by Python's csv module in each dialect a desktop produces, and Parquet."""

    ROWS = [("path", "label", "group"), ("a.jpg", "cat", "s1"), ("sub\\b.jpg", "dog, large", ""),
            ("sub/c.jpg", "eel", 'the "big" one')]
    PATHS = ["a.jpg", "sub/b.jpg", "sub/c.jpg"]

    def _write(self, tmp_path, *, bom=False, **dialect):
        buffer = io.StringIO(newline="")
        csv.writer(buffer, **dialect).writerows(self.ROWS)
        path = tmp_path / "labels.csv"
        path.write_bytes((b"\xef\xbb\xbf" if bom else b"") + buffer.getvalue().encode("utf-8"))
        return path

    @pytest.mark.parametrize("dialect", [
        {},                                              # csv.excel: "," and \r\n (RFC 4180)
        {"lineterminator": "\n"},                        # a Unix export
        {"delimiter": ";"},                              # a spreadsheet set to a decimal comma
        {"delimiter": "\t"},                             # csv.excel_tab
        {"delimiter": ";", "quoting": csv.QUOTE_ALL},
    ])
    @pytest.mark.parametrize("bom", [False, True])
    def test_each_dialect_reads_the_same(self, tmp_path, dialect, bom):
        t = self._write(tmp_path, bom=bom, **dialect)
        got = layout.assign(self.PATHS, "table", labels_table=t)
        assert got["label"] == ["cat", "dog, large", "eel"]
        assert got["group"] == ["s1", "", 'the "big" one']

    def test_a_parquet_table(self, tmp_path):
        pa = pytest.importorskip("pyarrow")
        import pyarrow.parquet as pq

        header, *rows = self.ROWS
        table = pa.table({name: [r[k] for r in rows] for k, name in enumerate(header)})
        pq.write_table(table, tmp_path / "labels.parquet")
        got = layout.assign(self.PATHS, "table", labels_table=tmp_path / "labels.parquet")
        assert got["label"] == ["cat", "dog, large", "eel"]
        broken = tmp_path / "broken.parquet"
        broken.write_bytes(b"PAR1" + bytes(20))
        with pytest.raises(InputError, match="line 1: not a readable Parquet file"):
            layout.read_table(broken)

    def test_a_parquet_row_is_named_by_its_line(self, tmp_path):
        pa = pytest.importorskip("pyarrow")
        import pyarrow.parquet as pq

        pq.write_table(pa.table({"path": ["a.jpg", "../x.jpg"], "label": ["cat", "dog"]}), tmp_path / "t.parquet")
        with pytest.raises(InputError, match=r"line 3: '../x.jpg' escapes the root"):
            layout.read_table(tmp_path / "t.parquet")

    def test_a_line_after_a_quoted_line_break_keeps_its_number(self, tmp_path):
        t = tmp_path / "labels.csv"
        t.write_bytes(b'path,label\r\na.jpg,"two\r\nlines"\r\n/abs.jpg,cat\r\n')
        with pytest.raises(InputError, match="line 4: '/abs.jpg' is absolute"):
            layout.read_table(t)

    @pytest.mark.parametrize("data, message", [
        (b"PK\x03\x04" + bytes(30), "line 1: not a CSV table but a zip container such as an Excel"),
        ("path,label\na.jpg,cat\n".encode("utf-16"), "line 1: not a CSV table but UTF-16 text"),
        (b"path,label\na.jpg,cat\nb.jpg,d\x00g\n", "line 3: holds a NUL character"),
        (b'path,label\na.jpg,"cat\n', "line 2: unexpected end of data"),
    ])
    def test_anything_else_is_named_with_its_line(self, tmp_path, data, message):
        t = tmp_path / "labels.csv"
        t.write_bytes(data)
        with pytest.raises(InputError, match=message):
            layout.read_table(t)
