"""The command-line front end: registry, usage errors, error lines."""

from __future__ import annotations

import pytest
from ranktide.cli import main as cli


def test_every_registered_command_has_help_and_example():
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    assert set(sub.choices) <= set(cli.COMMANDS)
    for name, p in sub.choices.items():
        text = p.format_help()
        assert "example:" in text and f"ranktide {name}" in text, name


def test_no_command_prints_help_and_exits_2(capsys):
    assert cli.main([]) == 2


def test_unknown_option_is_one_line_exit_2(capsys):
    with pytest.raises(SystemExit) as exc:
        cli.main(["--no-such-option"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "see --help" in err[0]


def test_train_stopped_before_lam_max_says_so_and_writes_no_model(tmp_path, capsys):
    # A run whose time budget ends inside the lam_max phase has no lam yet: one line says
    # so, the exit status is 3 (not 0, not 2) and no model directory is written.
    import numpy as np
    import scipy.sparse as sp
    from ranktide.store import write_store

    rng = np.random.default_rng(0)
    X = sp.random(200, 30, density=0.2, format="csr", random_state=1, dtype=np.float32)
    write_store(tmp_path / "s.zarr", X, rng.integers(0, 4, 200).astype(np.int32))
    code = cli.main(["train", str(tmp_path / "s.zarr"), "--loss", "softmax", "--lam-scale",
                     "0.1", "--out", str(tmp_path / "run"), "--max-seconds", "1e-6", "--quiet"])
    assert code == 3
    cap = capsys.readouterr()
    err = cap.err.strip().splitlines()
    assert len(err) == 1 and "no model" in err[0] and "lam_max" in err[0], err
    assert "--max-seconds" in err[0] and "ranktide resume" in err[0]
    assert cap.out == ""
    assert not (tmp_path / "run" / "model").exists()


def test_every_command_has_quiet():
    parser = cli.build_parser()
    sub = next(a for a in parser._actions if a.dest == "command")
    missing = [n for n, p in sub.choices.items() if "--quiet" not in p.format_help()]
    assert missing == []
