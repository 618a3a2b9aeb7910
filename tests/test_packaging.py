"""The installed distribution exposes one import name, ``ranktide``.

Run from an empty directory so that the repository's folders (``stream/``,
``kernels/``) are not on the path by accident; what imports there is what an
installed environment has.

No outside reference applies here: these check the project's own contract from the issue
(common practice, no source).
"""

from __future__ import annotations

import subprocess
import sys


def _imports(module: str, cwd) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", f"import {module}"], cwd=cwd,
                          capture_output=True, text=True, timeout=120)


def test_ranktide_imports_and_the_generic_names_do_not(tmp_path):
    ok = _imports("ranktide, ranktide.kernels, ranktide.cli.main", tmp_path)
    assert ok.returncode == 0, ok.stderr
    for name in ("stream", "kernels"):
        bad = _imports(name, tmp_path)
        assert bad.returncode != 0
        assert f"No module named '{name}'" in bad.stderr


def test_public_api_names_resolve(tmp_path):
    names = ("open_store", "write_store", "ingest_file", "train", "resume", "load_model",
             "evaluate", "predict_to_file", "split_store", "inspect_store")
    code = "import ranktide; " + "; ".join(f"assert callable(ranktide.{n})" for n in names)
    done = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 0, done.stderr
