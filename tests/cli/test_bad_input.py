"""Every malformed input gives one line on stderr, exit status 2, and no output.

The command line is driven in-process through ``ranktide.cli.main.main``; each case
checks the status, that stderr is exactly one line, what it says (file name,
line or entry, problem) and that nothing is left under the output name or as
a temporary or scratch sibling.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
from ranktide.cli.main import main

BANNER = "%%MatrixMarket matrix coordinate real general\n"


def run_ingest(tmp_path: Path, capsys, text: str | bytes | None, *extra: str,
               name: str = "in.mtx") -> str:
    """Write ``text`` to a source file, run ``ranktide ingest``; return the stderr line."""
    src = tmp_path / name
    if text is not None:
        if isinstance(text, str):
            text = text.encode()
        src.write_bytes(text)
    out = tmp_path / "out.zarr"
    capsys.readouterr()
    rc = main(["ingest", str(src), "--out", str(out), "--quiet", *extra])
    err = capsys.readouterr().err
    assert rc == 2
    lines = err.strip("\n").split("\n")
    assert len(lines) == 1, err
    assert not out.exists()
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".out.zarr")]
    return lines[0]


def mm(entries: str, size: str = "3 3 2") -> str:
    return BANNER + "% invented\n" + size + "\n" + entries


CASES = [
    # (id, file text, extra args, regex the message must match)
    ("empty", "", (), r"in\.mtx: line 1: empty file"),
    ("no-banner", "3 3 1\n1 1 1\n", (), r"in\.mtx: line 1: missing Matrix Market banner"),
    ("short-banner", "%%MatrixMarket matrix coordinate\n1 1 0\n", (),
     r"line 1: banner has 2 words"),
    ("object", "%%MatrixMarket vector coordinate real general\n1 1 0\n", (),
     r"line 1: object 'vector' is unsupported"),
    ("array", "%%MatrixMarket matrix array real general\n2 2\n1\n2\n3\n4\n", (),
     r"line 1: format 'array' is unsupported"),
    ("complex", "%%MatrixMarket matrix coordinate complex general\n1 1 1\n1 1 1 0\n", (),
     r"line 1: field 'complex' is unsupported"),
    ("symmetric", "%%MatrixMarket matrix coordinate real symmetric\n2 2 1\n1 1 1\n", (),
     r"line 1: symmetry 'symmetric' is unsupported; expand"),
    ("hermitian", "%%MatrixMarket matrix coordinate real hermitian\n2 2 1\n1 1 1\n", (),
     r"symmetry 'hermitian' is unsupported"),
    ("skew", "%%MatrixMarket matrix coordinate real skew-symmetric\n2 2 1\n2 1 1\n", (),
     r"symmetry 'skew-symmetric' is unsupported"),
    ("size-words", BANNER + "3 three 2\n", (), r"line 2: size line must be three integers"),
    ("size-missing", BANNER + "% only a comment\n", (), r"line 3: missing size line"),
    ("fewer", mm("1 1 1.0\n"), (), r"line 5: file ends after 1 entries but the size line "
     r"declares 2"),
    ("more", mm("1 1 1.0\n2 2 2.0\n3 3 3.0\n"), (),
     r"line 6: more entries than the 2 declared"),
    ("zero-index", mm("1 1 1.0\n0 2 2.0\n"), (), r"line 5: row index 0 in a 1-based file"),
    ("zero-col", mm("1 0 1.0\n2 2 2.0\n"), (), r"line 4: column index 0 in a 1-based file"),
    ("negative", mm("1 1 1.0\n-2 2 2.0\n"), (), r"line 5: the row index is negative"),
    ("beyond-row", mm("1 1 1.0\n4 2 2.0\n"), (),
     r"line 5: row index 4 is beyond the declared 3 rows"),
    ("beyond-col", mm("1 1 1.0\n2 9 2.0\n"), (),
     r"line 5: column index 9 is beyond the declared 3 columns"),
    ("int64", mm("1 1 1.0\n2 99999999999999999999 2.0\n"), (),
     r"line 5: the column index is too large for a 64-bit integer"),
    ("fractional", mm("1 1 1.0\n2.5 2 2.0\n"), (), r"line 5: the row index is fractional"),
    ("nan", mm("1 1 nan\n2 2 2.0\n"), (), r"line 4: the value is NaN"),
    ("inf", mm("1 1 1.0\n2 2 -Infinity\n"), (), r"line 5: the value is infinite"),
    ("overflow", mm("1 1 1.0\n2 2 1e999\n"), (), r"line 5: the value overflows to infinity"),
    ("word", mm("1 1 1.0\n2 2 two\n"), (), r"line 5: the value is not a number in '2 2 two'"),
    ("few-fields", mm("1 1 1.0\n2 2\n"), (), r"line 5: too few fields.*3 fields"),
    ("many-fields", mm("1 1 1.0\n2 2 2 2\n"), (), r"line 5: too many fields"),
    ("int-field", "%%MatrixMarket matrix coordinate integer general\n2 2 1\n1 1 1.5\n", (),
     r"line 3: the value is not an integer in an 'integer' file"),
    ("binary", b"\x00\x01\x02garbage\xff" * 40, (), r"line 1: binary data"),
    ("gzip", b"\x1f\x8b\x08\x00" + b"\x00" * 40, (), r"gzip-compressed"),
    ("triplet-zero-one-based", "0 1 1.0\n", ("--one-based",),
     r"in\.txt: line 1: row index 0 in a 1-based file; indices start at 1 with --one-based"),
    ("triplet-negative", "# c\n1 2 3\n1 -2 3\n", (),
     r"in\.txt: line 3: the column index is negative in .1 -2 3.; indices must be >= 0"),
    ("triplet-few", "1 2 3\n\n4 5\n", (), r"in\.txt: line 3: too few fields"),
    ("triplet-text", "1 2 3\nrow col value\n", (), r"in\.txt: line 2: the row index is not a "
     r"number"),
]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_malformed_matrix(tmp_path, capsys, case):
    _id, text, extra, pattern = case
    name = "in.txt" if _id.startswith("triplet") else "in.mtx"
    msg = run_ingest(tmp_path, capsys, text, *extra, name=name)
    assert "ranktide ingest: error:" in msg
    assert name in msg
    assert __import__("re").search(pattern, msg), msg


def test_missing_file(tmp_path, capsys):
    msg = run_ingest(tmp_path, capsys, None)
    assert "in.mtx: input file not found" in msg


def test_directory_as_source(tmp_path, capsys):
    (tmp_path / "in.mtx").mkdir()
    msg = run_ingest(tmp_path, capsys, None)
    assert "is a directory" in msg


@pytest.mark.skipif(os.geteuid() == 0, reason="root reads and writes files whatever their mode")
def test_unreadable_file(tmp_path, capsys):
    src = tmp_path / "in.mtx"
    src.write_text(mm("1 1 1\n2 2 2\n"))
    src.chmod(0)
    msg = run_ingest(tmp_path, capsys, None)
    assert "not readable" in msg


def test_unwritable_output(tmp_path, capsys):
    src = tmp_path / "in.mtx"
    src.write_text(mm("1 1 1\n2 2 2\n"))
    capsys.readouterr()
    rc = main(["ingest", str(src), "--out", str(tmp_path / "no" / "such" / "out.zarr")])
    err = capsys.readouterr().err.strip().split("\n")
    assert rc == 2 and len(err) == 1 and "does not exist; create it first" in err[0]
    if os.geteuid() != 0:  # root ignores directory modes
        ro = tmp_path / "ro"
        ro.mkdir()
        ro.chmod(0o500)
        rc = main(["ingest", str(src), "--out", str(ro / "out.zarr")])
        assert rc == 2 and "permission denied" in capsys.readouterr().err


def test_output_exists(tmp_path, capsys):
    src = tmp_path / "in.mtx"
    src.write_text(mm("1 1 1\n2 2 2\n"))
    out = tmp_path / "out.zarr"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    rc = main(["ingest", str(src), "--out", str(out)])
    err = capsys.readouterr().err.strip().split("\n")
    assert rc == 2 and len(err) == 1 and "already exists; pass --overwrite" in err[0]
    assert (out / "keep.txt").read_text() == "mine"
    assert main(["ingest", str(src), "--out", str(out), "--overwrite", "--quiet"]) == 0
    assert not (out / "keep.txt").exists()


def test_duplicates_error(tmp_path, capsys):
    msg = run_ingest(tmp_path, capsys, mm("2 2 1.0\n2 2 2.0\n"), "--duplicates", "error")
    assert "entry (row 2, column 2) appears more than once" in msg


def _good(tmp_path: Path) -> Path:
    src = tmp_path / "in.mtx"
    src.write_text(mm("1 1 1.0\n3 2 2.0\n"))
    return src


def test_target_count_differs(tmp_path, capsys):
    _good(tmp_path)
    (tmp_path / "y.txt").write_text("a\nb\n")
    msg = run_ingest(tmp_path, capsys, None, "--labels", str(tmp_path / "y.txt"))
    assert "y.txt: has 2 lines of targets but the matrix has 3 rows" in msg


def test_values_row_count_differs(tmp_path, capsys):
    _good(tmp_path)
    np.save(tmp_path / "v.npy", np.zeros((4, 2)))
    msg = run_ingest(tmp_path, capsys, None, "--values", str(tmp_path / "v.npy"))
    assert "v.npy: has 4 rows of targets but the matrix has 3 rows" in msg


def test_empty_label_line(tmp_path, capsys):
    _good(tmp_path)
    (tmp_path / "y.txt").write_text("a\n\nb\n")
    msg = run_ingest(tmp_path, capsys, None, "--labels", str(tmp_path / "y.txt"))
    assert "y.txt: line 2: blank line inside the labels" in msg


def test_negative_weight(tmp_path, capsys):
    _good(tmp_path)
    (tmp_path / "w.txt").write_text("1\n0.5\n-2\n")
    msg = run_ingest(tmp_path, capsys, None, "--weights", str(tmp_path / "w.txt"))
    assert "w.txt: line 3: weight -2.0 is invalid; weights must be finite and >= 0" in msg


def test_weight_count_and_word(tmp_path, capsys):
    _good(tmp_path)
    (tmp_path / "w.txt").write_text("1\n2\n")
    msg = run_ingest(tmp_path, capsys, None, "--weights", str(tmp_path / "w.txt"))
    assert "w.txt: has 2 weights but the matrix has 3 rows" in msg
    (tmp_path / "w.txt").write_text("1\nheavy\n3\n")
    msg = run_ingest(tmp_path, capsys, None, "--weights", str(tmp_path / "w.txt"))
    assert "w.txt: line 2: the weight is not a number" in msg


def test_nan_target_value(tmp_path, capsys):
    _good(tmp_path)
    v = np.zeros((3, 2))
    v[2, 1] = np.nan
    np.save(tmp_path / "v.npy", v)
    msg = run_ingest(tmp_path, capsys, None, "--values", str(tmp_path / "v.npy"))
    assert "v.npy: row 3, column 2: target value nan is not finite" in msg


def test_pickled_npz_refused(tmp_path, capsys):
    np.savez(tmp_path / "in.npz", data=np.array([{"a": 1}], dtype=object))
    msg = run_ingest(tmp_path, capsys, None, name="in.npz")
    assert "in.npz: not a scipy sparse .npz" in msg


# --------------------------------------------------------------------------- stores


def _store(tmp_path: Path) -> Path:
    src = _good(tmp_path)
    out = tmp_path / "s.zarr"
    assert main(["ingest", str(src), "--out", str(out), "--quiet"]) == 0
    return out


def run_inspect(capsys, path: Path) -> str:
    capsys.readouterr()
    rc = main(["inspect", str(path)])
    err = capsys.readouterr().err.strip().split("\n")
    assert rc == 2 and len(err) == 1, err
    return err[0]


def test_inspect_not_a_store(tmp_path, capsys):
    (tmp_path / "plain").mkdir()
    assert "not a ranktide store" in run_inspect(capsys, tmp_path / "plain")
    assert "no such store" in run_inspect(capsys, tmp_path / "missing.zarr")


def test_inspect_newer_version(tmp_path, capsys):
    out = _store(tmp_path)
    meta = json.loads((out / "zarr.json").read_text())
    meta["attributes"]["ranktide"]["format_version"] = 99
    (out / "zarr.json").write_text(json.dumps(meta))
    assert "format version 99 is newer" in run_inspect(capsys, out)


def test_inspect_corrupted_segment(tmp_path, capsys):
    import zarr

    out = _store(tmp_path)
    arr = zarr.open_array(str(out / "data"), mode="r+")
    arr[0] = 12345.0  # a valid chunk whose checksum no longer matches
    msg = run_inspect(capsys, out)
    assert "s.zarr" in msg and "segment 0" in msg


def test_triplets_without_entries(tmp_path, capsys):
    msg = run_ingest(tmp_path, capsys, "# only a comment\n\n", name="in.txt")
    assert "in.txt: no entries" in msg


def test_npz_over_memory_budget(tmp_path, capsys):
    import scipy.sparse as sp

    sp.save_npz(tmp_path / "in.npz", sp.random(200, 200, density=0.5, random_state=0))
    msg = run_ingest(tmp_path, capsys, None, "--memory", "100kB", name="in.npz")
    assert "in.npz: loading this .npz whole needs about" in msg and "raise --memory" in msg


def test_both_labels_and_tags_refused(tmp_path, capsys):
    _good(tmp_path)
    (tmp_path / "y.txt").write_text("a\nb\nc\n")
    capsys.readouterr()
    with pytest.raises(SystemExit) as exc:
        main(["ingest", str(tmp_path / "in.mtx"), "--out", str(tmp_path / "o.zarr"),
              "--labels", str(tmp_path / "y.txt"), "--tags", str(tmp_path / "y.txt")])
    assert exc.value.code == 2 and "not allowed with argument" in capsys.readouterr().err
