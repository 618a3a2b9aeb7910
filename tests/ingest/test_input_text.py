"""Input text (issue 13): byte-order marks, blank lines, the tags separator, numbers in
messages counted from 1 and printed plainly, --version, top-level error lines, a text
file given as --values.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.io
import scipy.sparse as sp
from ranktide import __version__
from ranktide.store import open_store
from userfiles import refused, run_cli, snapshot, write_tiny

BOM = "\ufeff"


def _matrix(tmp_path, n=4):
    # scipy.io.mmwrite writes a standard Matrix Market coordinate file
    scipy.io.mmwrite(tmp_path / "a.mtx", sp.random(n, 3, density=0.5, random_state=2))
    return tmp_path / "a.mtx"


def _ingest(capsys, tmp_path, *extra):
    rc, err = run_cli(capsys, "ingest", tmp_path / "a.mtx", "--out", tmp_path / "s.zarr",
                      "--quiet", *extra)
    assert rc == 0, err
    with open_store(tmp_path / "s.zarr") as st:
        if st.target_kind == "tags":
            T = sp.vstack([b.targets for b in st.blocks()]).toarray().astype(int).tolist()
        else:
            T = np.concatenate([b.targets for b in st.blocks()]).tolist()
        return st.output_names, T


def test_bom_is_not_part_of_the_first_label(tmp_path, capsys):
    _matrix(tmp_path)
    (tmp_path / "y.txt").write_text(BOM + "a\nb\na\nb\n", encoding="utf-8")
    names, y = _ingest(capsys, tmp_path, "--labels", tmp_path / "y.txt")
    assert names == ["a", "b"] and y == [0, 1, 0, 1]


def test_bom_is_not_part_of_the_first_tag(tmp_path, capsys):
    _matrix(tmp_path)
    (tmp_path / "t.txt").write_text(BOM + "red,blue\nblue\n\nred\n", encoding="utf-8")
    names, T = _ingest(capsys, tmp_path, "--tags", tmp_path / "t.txt")
    assert names == ["blue", "red"]
    assert T == [[1, 1], [1, 0], [0, 0], [0, 1]]


@pytest.mark.parametrize("tail", ["\n", "\n\n\n", "\n \n\t\n"])
def test_trailing_blank_lines_are_accepted(tmp_path, capsys, tail):
    _matrix(tmp_path)
    (tmp_path / "y.txt").write_text("a\nb\na\nb" + tail)
    names, y = _ingest(capsys, tmp_path, "--labels", tmp_path / "y.txt")
    assert names == ["a", "b"] and y == [0, 1, 0, 1]


def test_trailing_blank_lines_of_a_tags_file_beyond_the_rows(tmp_path, capsys):
    _matrix(tmp_path)
    (tmp_path / "t.txt").write_text("red\n\nblue\n\n\n\n")  # row 4 has no tags
    names, T = _ingest(capsys, tmp_path, "--tags", tmp_path / "t.txt")
    assert T == [[0, 1], [0, 0], [1, 0], [0, 0]]


@pytest.mark.parametrize("text, line", [("a\n\nb\na\nb\n", 2), ("a\nb\na\n\n\nb\n", 4),
                                        (" \na\nb\na\nb\n", 1)])
def test_blank_line_inside_labels_is_refused_with_its_line(tmp_path, capsys, text, line):
    _matrix(tmp_path)
    (tmp_path / "y.txt").write_text(text)
    before = snapshot(tmp_path)
    msg = refused(capsys, "ingest", tmp_path / "a.mtx", "--labels", tmp_path / "y.txt",
                  "--out", tmp_path / "s.zarr", "--quiet")
    assert f"y.txt: line {line}: blank line inside the labels" in msg
    assert snapshot(tmp_path) == before


def test_blank_line_inside_labels_across_read_chunks(tmp_path):
    from ranktide.errors import InputError
    from ranktide.ingest.targets import open_targets

    (tmp_path / "y.txt").write_text("a\n" * 50 + "\n" * 30 + "b\n")
    with pytest.raises(InputError, match=r"line 51: blank line inside the labels"):
        open_targets(labels=tmp_path / "y.txt", chunk_bytes=16)
    (tmp_path / "z.txt").write_text("a\n" * 50 + "\n" * 30)
    assert open_targets(labels=tmp_path / "z.txt", chunk_bytes=16).n_rows == 50


def test_a_tag_with_white_space_needs_the_separator(tmp_path, capsys):
    _matrix(tmp_path)
    (tmp_path / "t.txt").write_text("paint\nhand tools,paint\n\nhand tools\n")
    before = snapshot(tmp_path)
    msg = refused(capsys, "ingest", tmp_path / "a.mtx", "--tags", tmp_path / "t.txt",
                  "--out", tmp_path / "s.zarr", "--quiet")
    assert "t.txt: line 2: the tag 'hand tools' contains white space" in msg
    assert "--tag-sep comma" in msg and "--tag-sep space" in msg
    assert snapshot(tmp_path) == before
    names, T = _ingest(capsys, tmp_path, "--tags", tmp_path / "t.txt", "--tag-sep", "comma")
    assert names == ["hand tools", "paint"]
    assert T == [[0, 1], [1, 1], [0, 0], [1, 0]]
    (tmp_path / "s.zarr").rename(tmp_path / "kept.zarr")
    (tmp_path / "u.txt").write_text("paint\nhand  tools\n\nhand\ttools paint\n")
    names, T = _ingest(capsys, tmp_path, "--tags", tmp_path / "u.txt", "--tag-sep", "space")
    assert names == ["hand", "paint", "tools"]
    assert T == [[0, 1, 0], [1, 0, 1], [0, 0, 0], [1, 1, 1]]


def test_rows_and_columns_count_from_one(tmp_path, capsys):
    # a 0-based triplet file with a repeated entry at row 0, column 0
    (tmp_path / "t.txt").write_text("0 0 1.0\n1 1 2.0\n0 0 3.0\n")
    msg = refused(capsys, "ingest", tmp_path / "t.txt", "--format", "triplets",
                  "--duplicates", "error", "--out", tmp_path / "s.zarr", "--quiet")
    assert "entry (row 1, column 1) appears more than once" in msg
    # a scipy .npz with a non-finite value in its second row, third column
    M = sp.csr_matrix(np.array([[1.0, 0, 0], [0, 0, np.inf]]))
    sp.save_npz(tmp_path / "m.npz", M)
    msg = refused(capsys, "ingest", tmp_path / "m.npz", "--out", tmp_path / "s.zarr",
                  "--quiet")
    assert "entry (row 2, column 3): value inf is not finite" in msg


def test_weights_file_rows_count_from_one(tmp_path, capsys):
    # a .npy weights file whose third value (index 2) is negative: row 3 of the file, as the
    # text weights file names its line 3
    _matrix(tmp_path)
    np.save(tmp_path / "w.npy", np.array([1.0, 2.0, -1.0, 1.0]))
    before = snapshot(tmp_path)
    msg = refused(capsys, "ingest", tmp_path / "a.mtx", "--weights", tmp_path / "w.npy",
                  "--out", tmp_path / "s.zarr", "--quiet")
    assert "w.npy: row 3: weight -1.0 is invalid" in msg, msg
    (tmp_path / "w.txt").write_text("1\n2\n-1\n1\n")
    msg = refused(capsys, "ingest", tmp_path / "a.mtx", "--weights", tmp_path / "w.txt",
                  "--out", tmp_path / "s.zarr", "--quiet")
    assert "w.txt: line 3: weight -1.0 is invalid" in msg, msg
    del before["w.npy"]
    assert {k: v for k, v in snapshot(tmp_path).items() if k not in ("w.npy", "w.txt")} \
        == before


def test_numbers_print_plainly(tmp_path, capsys):
    mtx, lab = write_tiny(tmp_path)
    assert run_cli(capsys, "ingest", mtx, "--labels", lab, "--out", tmp_path / "s.zarr",
                   "--quiet")[0] == 0
    (tmp_path / "cw.txt").write_text("1\n-1\n1\n")
    msg = refused(capsys, "train", tmp_path / "s.zarr", "--loss", "softmax", "--lam", "0.1",
                  "--class-weight", tmp_path / "cw.txt", "--out", tmp_path / "run", "--quiet")
    assert "cw.txt: entry 2 is -1.0; class weights must be finite and >= 0" in msg
    assert "np." not in msg and not (tmp_path / "run").exists()


def test_version_and_top_level_errors(capsys):
    with pytest.raises(SystemExit) as exc:
        from ranktide.cli.main import main

        main(["--version"])
    assert exc.value.code == 0
    assert capsys.readouterr().out.strip() == f"ranktide {__version__}"
    rc, err = run_cli(capsys, "--no-such-option")
    assert rc == 2 and err.startswith("ranktide: ") and "ranktide ranktide" not in err
    rc, err = run_cli(capsys, "ingest", "--no-such-option")
    assert rc == 2 and err.startswith("ranktide ingest: ")


def test_a_text_file_as_values_gets_our_message(tmp_path, capsys):
    _matrix(tmp_path)
    (tmp_path / "v.txt").write_text("1.0 2.0\n3.0 4.0\n5 6\n7 8\n")
    msg = refused(capsys, "ingest", tmp_path / "a.mtx", "--values", tmp_path / "v.txt",
                  "--out", tmp_path / "s.zarr", "--quiet")
    assert "v.txt: is a text file, not a .npy array; save the target values with numpy.save" \
        in msg
    assert "pickle" not in msg
