"""Build a real sparse multi-class / multi-label data set from the Debian package index.

Each row is one binary package from the apt lists of this machine:

* **features** -- hashed token counts of the package description (short line plus the long
  description from ``Translation-en`` when present) and of the names of the packages it
  depends on (``Depends``, ``Pre-Depends``, ``Recommends``; alternatives ``a | b`` give both
  names; version constraints, architecture qualifiers and build profiles are stripped).
  Dependency names are prefixed with ``dep:`` so that they never collide with words.
* **class** -- the archive ``Section`` with any ``contrib/``, ``non-free/`` or
  ``non-free-firmware/`` prefix removed.
* **tags** -- the debtags ``Tag:`` field (``facet::value`` items).  Tags of the
  ``special::`` facet (e.g. ``special::not-yet-tagged``) are book-keeping, not content,
  and are dropped.  Packages without a ``Tag:`` field get an empty tag row; such rows
  mean "untagged", not "no tag applies", and should be left out of a tag task.

Rebuilding the data set
-----------------------
The Debian image ships with ``Acquire::Languages "none"``, so the long descriptions
(``Translation-en``) are only fetched when asked for.  As root::

    apt-get update -o Acquire::Languages=en
    /work/main/.venv/bin/python tools/realdata.py --out /tmp/realdata --seed 0

A plain ``apt-get update`` afterwards deletes the ``Translation-en`` lists again; the
builder then falls back to the short descriptions and says so in ``summary.json``
(``"long_descriptions": false``).  The result depends on the day of the ``apt-get
update``: ``summary.json`` records every source file with its size, modification time and
SHA-256, and the ``Date:`` line of each suite's ``InRelease``.

Record selection
----------------
The same package name can appear in several suites (``bookworm``, ``bookworm-updates``,
``bookworm-security``).  One row is kept per name: the record from the index with the
most records (the base suite) wins, and the smaller indexes only add names that the base
suite lacks.  The base suite is the one that carries ``Tag:`` fields.

Split
-----
A per-class (stratified) random split with ``numpy.random.default_rng(seed)``: for a
class with ``n`` rows, ``n_test = max(1, floor(0.2 n))`` rows go to test when ``n >= 2``
(else 0), and of the ``m = n - n_test`` remaining rows ``n_val = max(1, floor(0.2 m))``
go to validation when ``m >= 3`` (else 0); the rest is train.  So every class keeps at
least one training row, rare classes are kept whole rather than dropped, a class of one
row appears in train only, and a class of two rows has one train and one test row.
``train`` and ``val`` together form the 80 % training part; ``val`` is a part of it.

Features
--------
Token ``t`` goes to column ``crc32(t.encode("utf-8")) % n_features`` (deterministic
across runs and machines).  Values are raw counts unless ``--tfidf`` (smoothed idf
``ln((1 + n) / (1 + df)) + 1`` with document frequencies from the train split only) and/or
``--unit-norm`` (each row scaled to unit Euclidean norm) are given.

Files written to ``--out``
--------------------------
``X_{train,val,test}.mtx``  Matrix Market, coordinate, real (or integer for raw counts).
``labels_{split}.txt``      one class name per line, row order of ``X_{split}``.
``tags_{split}.txt``        one row per line, tags separated by a single space (tags hold
                            no spaces); an empty line means an untagged package.
``packages_{split}.txt``    the package name of each row.
``classes.txt``             all class names, sorted, one per line.
``summary.json``            shape, nnz, class counts, tag counts, options, source files.
"""

from __future__ import annotations

import argparse
import hashlib
import json
import re
import subprocess
import zlib
from collections import Counter
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import scipy.io
import scipy.sparse as sp

LISTS_DIR = Path("/var/lib/apt/lists")
APT_HELPER = "/usr/lib/apt/apt-helper"
SPLITS = ("train", "val", "test")
DEP_FIELDS = ("Depends", "Pre-Depends", "Recommends")
SECTION_PREFIXES = ("contrib/", "non-free-firmware/", "non-free/")
DEP_PREFIX = "dep:"
TAG_SEP = " "
WORD_RE = re.compile(r"[a-z0-9][a-z0-9+#]*")
DEP_STRIP_RE = re.compile(r"\([^)]*\)|\[[^\]]*\]|<[^>]*>")


@dataclass
class Package:
    """One binary package record.

    Attributes
    ----------
    name : str
        Package name.
    section : str
        Section with any component prefix removed.
    text : str
        Short and (when available) long description.
    deps : list of str
        Dependency package names, constraint-free, in field order.
    tags : list of str
        Debtags, ``special::`` facet removed, sorted.
    """

    name: str
    section: str
    text: str
    deps: list[str] = field(default_factory=list)
    tags: list[str] = field(default_factory=list)


@dataclass
class Dataset:
    """In-memory data set.

    Attributes
    ----------
    X : dict of str to scipy.sparse.csr_matrix
        ``X[split]`` has shape (n_split, n_features), float64.
    y : dict of str to ndarray of int64
        ``y[split]`` has shape (n_split,), indices into ``classes``.
    tags : dict of str to list of list of str
        ``tags[split]`` has ``n_split`` entries.
    names : dict of str to list of str
        Package name of each row.
    classes : list of str
        Sorted class names, shape (n_classes,).
    summary : dict
        The JSON summary (see ``summary.json``).
    """

    X: dict[str, sp.csr_matrix]
    y: dict[str, np.ndarray]
    tags: dict[str, list[list[str]]]
    names: dict[str, list[str]]
    classes: list[str]
    summary: dict


# --------------------------------------------------------------------------- reading apt lists


def read_index(path: Path) -> str:
    """Return the decompressed text of one apt list file.

    Parameters
    ----------
    path : Path
        A file under ``/var/lib/apt/lists``, plain or compressed (lz4, gz, xz, zst).

    Returns
    -------
    str
        The deb822 text.
    """
    if path.suffix in ("", ".txt"):
        return path.read_text(encoding="utf-8", errors="replace")
    # apt-helper knows every compressor apt was built with (lz4 included).
    out = subprocess.run([APT_HELPER, "cat-file", str(path)], check=True, capture_output=True)
    return out.stdout.decode("utf-8", errors="replace")


def parse_stanzas(text: str) -> list[dict[str, str]]:
    """Parse deb822 text into stanzas.

    Parameters
    ----------
    text : str
        Text of a ``Packages`` or ``Translation`` file.

    Returns
    -------
    list of dict
        One dict per stanza; continuation lines are joined to their field with ``\\n``.
    """
    stanzas: list[dict[str, str]] = []
    current: dict[str, str] = {}
    key = ""
    for line in text.split("\n"):
        if not line.strip():
            if current:
                stanzas.append(current)
            current, key = {}, ""
        elif line[0] in " \t":
            if key:
                current[key] += "\n" + line[1:]
        else:
            key, _, value = line.partition(":")
            current[key] = value.strip()
    if current:
        stanzas.append(current)
    return stanzas


def find_lists(lists_dir: Path) -> tuple[list[Path], list[Path]]:
    """Locate the binary ``Packages`` lists and the English translation lists.

    Parameters
    ----------
    lists_dir : Path
        Usually ``/var/lib/apt/lists``.

    Returns
    -------
    packages, translations : list of Path
        Sorted paths.
    """
    packages = sorted(p for p in lists_dir.glob("*_Packages*") if "binary-" in p.name)
    translations = sorted(lists_dir.glob("*_i18n_Translation-en*"))
    return packages, translations


def long_descriptions(paths: list[Path]) -> dict[tuple[str, str], str]:
    """Map (package, Description-md5) to the full English description.

    Parameters
    ----------
    paths : list of Path
        ``Translation-en`` lists.

    Returns
    -------
    dict
        Key ``(name, md5)``, value the ``Description-en`` text (short line + long part).
    """
    out: dict[tuple[str, str], str] = {}
    for path in paths:
        for st in parse_stanzas(read_index(path)):
            if "Package" in st and "Description-en" in st:
                out[(st["Package"], st.get("Description-md5", ""))] = st["Description-en"]
    return out


def dep_names(stanza: dict[str, str]) -> list[str]:
    """Return the dependency package names of a stanza.

    Parameters
    ----------
    stanza : dict
        A ``Packages`` stanza.

    Returns
    -------
    list of str
        Names from ``Depends``, ``Pre-Depends`` and ``Recommends``; alternatives are
        split, version constraints ``(...)``, ``[arch]``, ``<profile>`` and ``:any``-style
        qualifiers removed.
    """
    names: list[str] = []
    for key in DEP_FIELDS:
        for alt in re.split(r"[,|]", DEP_STRIP_RE.sub(" ", stanza.get(key, ""))):
            name = alt.strip().split(":")[0].strip()
            if name:
                names.append(name)
    return names


def clean_section(section: str) -> str:
    """Strip a component prefix (``contrib/`` etc.) from a section name."""
    for prefix in SECTION_PREFIXES:
        if section.startswith(prefix):
            return section[len(prefix) :]
    return section


def parse_tags(value: str) -> list[str]:
    """Split a ``Tag:`` value into sorted tags, dropping the ``special::`` facet."""
    tags = {t.strip() for t in value.replace("\n", " ").split(",")}
    return sorted(t for t in tags if t and not t.startswith("special::"))


def to_package(st: dict[str, str], longs: dict[tuple[str, str], str]) -> Package:
    """Turn a ``Packages`` stanza into a :class:`Package`."""
    key = (st["Package"], st.get("Description-md5", ""))
    text = longs.get(key, st.get("Description", ""))
    return Package(
        name=st["Package"],
        section=clean_section(st.get("Section", "unknown")),
        text=text,
        deps=dep_names(st),
        tags=parse_tags(st.get("Tag", "")),
    )


def load_packages(lists_dir: Path = LISTS_DIR) -> tuple[list[Package], dict]:
    """Read and merge all binary package lists.

    Parameters
    ----------
    lists_dir : Path
        Directory of apt lists.

    Returns
    -------
    packages : list of Package
        One per package name, sorted by name.
    info : dict
        Source-file metadata and counts for the summary.
    """
    pkg_paths, tr_paths = find_lists(lists_dir)
    if not pkg_paths:
        raise FileNotFoundError(f"no *_Packages* lists in {lists_dir}; run apt-get update")
    longs = long_descriptions(tr_paths)
    indexes = [(p, parse_stanzas(read_index(p))) for p in pkg_paths]
    indexes.sort(key=lambda item: (-len(item[1]), item[0].name))
    chosen: dict[str, dict[str, str]] = {}
    for _, stanzas in indexes:
        for st in stanzas:
            if "Package" in st:
                chosen.setdefault(st["Package"], st)
    packages = [to_package(chosen[n], longs) for n in sorted(chosen)]
    n_long = sum((p.name, chosen[p.name].get("Description-md5", "")) in longs for p in packages)
    info = {
        "sources": [file_info(p, len(s)) for p, s in indexes] + [file_info(p) for p in tr_paths],
        "release_dates": release_dates(lists_dir),
        "long_descriptions": bool(tr_paths),
        "rows_with_long_description": int(n_long),
        "records_read": int(sum(len(s) for _, s in indexes)),
    }
    return packages, info


def file_info(path: Path, records: int | None = None) -> dict:
    """Describe one source file (name, size, mtime, SHA-256, record count)."""
    stat = path.stat()
    info = {
        "path": str(path),
        "bytes": stat.st_size,
        "mtime_utc": datetime.fromtimestamp(stat.st_mtime, timezone.utc).isoformat(),
        "sha256": hashlib.sha256(path.read_bytes()).hexdigest(),
    }
    if records is not None:
        info["records"] = records
    return info


def release_dates(lists_dir: Path) -> dict[str, str]:
    """Return the ``Date:`` line of each ``InRelease``/``Release`` file, by file name."""
    dates: dict[str, str] = {}
    for path in sorted(lists_dir.glob("*Release")):
        for line in path.read_text(encoding="utf-8", errors="replace").split("\n"):
            if line.startswith("Date:"):
                dates[path.name] = line[5:].strip()
                break
    return dates


# --------------------------------------------------------------------------- features


def tokens(pkg: Package) -> list[str]:
    """Return the token list of a package: lower-cased words then ``dep:`` names."""
    words = WORD_RE.findall(pkg.text.lower())
    return words + [DEP_PREFIX + d for d in pkg.deps]


def bucket(token: str, n_features: int) -> int:
    """Deterministic hash bucket of a token (CRC-32 modulo ``n_features``)."""
    return zlib.crc32(token.encode("utf-8")) % n_features


def hash_counts(packages: list[Package], n_features: int) -> sp.csr_matrix:
    """Hashed token counts.

    Parameters
    ----------
    packages : list of Package
        Rows, length n_rows.
    n_features : int
        Number of hash buckets.

    Returns
    -------
    scipy.sparse.csr_matrix
        Shape (n_rows, n_features), float64 counts, canonical (sorted, summed duplicates).
    """
    indptr = [0]
    indices: list[int] = []
    cache: dict[str, int] = {}
    for pkg in packages:
        for tok in tokens(pkg):
            col = cache.get(tok)
            if col is None:
                col = cache[tok] = bucket(tok, n_features)
            indices.append(col)
        indptr.append(len(indices))
    data = np.ones(len(indices), dtype=np.float64)
    shape = (len(packages), n_features)
    X = sp.csr_matrix((data, np.asarray(indices, dtype=np.int64), indptr), shape=shape)
    X.sum_duplicates()
    return X


def idf_weights(X_train: sp.csr_matrix) -> np.ndarray:
    """Smoothed idf ``ln((1 + n) / (1 + df)) + 1`` from the training rows, shape (n_features,)."""
    df = np.bincount(X_train.indices, minlength=X_train.shape[1])
    return np.log((1.0 + X_train.shape[0]) / (1.0 + df)) + 1.0


def unit_rows(X: sp.csr_matrix) -> sp.csr_matrix:
    """Scale each non-empty row of ``X`` (n_rows, n_features) to unit Euclidean norm."""
    norms = np.sqrt(np.asarray(X.multiply(X).sum(axis=1)).ravel())
    norms[norms == 0] = 1.0
    return sp.csr_matrix(sp.diags(1.0 / norms) @ X)


def scale(X: dict[str, sp.csr_matrix], tfidf: bool, unit_norm: bool) -> dict[str, sp.csr_matrix]:
    """Apply the optional tf-idf and unit-norm scalings to every split."""
    if tfidf:
        w = sp.diags(idf_weights(X["train"]))
        X = {k: sp.csr_matrix(v @ w) for k, v in X.items()}
    if unit_norm:
        X = {k: unit_rows(v) for k, v in X.items()}
    return X


# --------------------------------------------------------------------------- split


def class_split_sizes(n: int) -> tuple[int, int]:
    """Return ``(n_test, n_val)`` for a class of ``n`` rows (see module docstring)."""
    n_test = max(1, n // 5) if n >= 2 else 0
    m = n - n_test
    n_val = max(1, m // 5) if m >= 3 else 0
    return n_test, n_val


def stratified_split(y: np.ndarray, seed: int) -> dict[str, np.ndarray]:
    """Per-class random split into train / val / test.

    Parameters
    ----------
    y : ndarray of int
        Class index of each row, shape (n_rows,).
    seed : int
        Seed for ``numpy.random.default_rng``.

    Returns
    -------
    dict of str to ndarray of int64
        Sorted row indices of each split; together they partition ``range(n_rows)``.
    """
    rng = np.random.default_rng(seed)
    parts: dict[str, list[np.ndarray]] = {s: [] for s in SPLITS}
    for c in np.unique(y):
        rows = rng.permutation(np.flatnonzero(y == c))
        n_test, n_val = class_split_sizes(rows.size)
        parts["test"].append(rows[:n_test])
        parts["val"].append(rows[n_test : n_test + n_val])
        parts["train"].append(rows[n_test + n_val :])
    return {s: np.sort(np.concatenate(parts[s])).astype(np.int64) for s in SPLITS}


# --------------------------------------------------------------------------- build / write


def build(
    seed: int = 0,
    n_features: int = 2**18,
    tfidf: bool = False,
    unit_norm: bool = False,
    lists_dir: Path = LISTS_DIR,
) -> Dataset:
    """Build the data set in memory.

    Parameters
    ----------
    seed : int
        Split seed.
    n_features : int
        Number of hash buckets (columns).
    tfidf, unit_norm : bool
        Optional scalings (see module docstring).
    lists_dir : Path
        Directory of apt lists.

    Returns
    -------
    Dataset
        CSR matrices of shape (n_split, n_features), labels, tags, names and a summary.
    """
    packages, info = load_packages(lists_dir)
    classes = sorted({p.section for p in packages})
    y_all = np.searchsorted(classes, [p.section for p in packages]).astype(np.int64)
    idx = stratified_split(y_all, seed)
    X_all = hash_counts(packages, n_features)
    X = scale({s: X_all[idx[s]] for s in SPLITS}, tfidf, unit_norm)
    y = {s: y_all[idx[s]] for s in SPLITS}
    tags = {s: [packages[i].tags for i in idx[s]] for s in SPLITS}
    names = {s: [packages[i].name for i in idx[s]] for s in SPLITS}
    options = {"seed": seed, "n_features": n_features, "tfidf": tfidf, "unit_norm": unit_norm}
    summary = make_summary(X, y, tags, classes, options, info)
    return Dataset(X=X, y=y, tags=tags, names=names, classes=classes, summary=summary)


def make_summary(
    X: dict[str, sp.csr_matrix],
    y: dict[str, np.ndarray],
    tags: dict[str, list[list[str]]],
    classes: list[str],
    options: dict,
    info: dict,
) -> dict:
    """Assemble the JSON-serialisable summary of a built data set."""
    all_y = np.concatenate([y[s] for s in SPLITS])
    counts = np.bincount(all_y, minlength=len(classes))
    tag_counts = Counter(t for s in SPLITS for row in tags[s] for t in row)
    nnz = sum(X[s].nnz for s in SPLITS)
    return {
        "rows": int(all_y.size),
        "cols": int(options["n_features"]),
        "nnz": int(nnz),
        "classes": len(classes),
        "split_rows": {s: int(X[s].shape[0]) for s in SPLITS},
        "split_nnz": {s: int(X[s].nnz) for s in SPLITS},
        "class_counts": {c: int(n) for c, n in zip(classes, counts, strict=True)},
        "class_count_min_median_max": [
            int(counts.min()),
            float(np.median(counts)),
            int(counts.max()),
        ],
        "train_class_counts": np.bincount(y["train"], minlength=len(classes)).tolist(),
        "tagged_rows": int(sum(bool(r) for s in SPLITS for r in tags[s])),
        "distinct_tags": len(tag_counts),
        "tag_separator": TAG_SEP,
        "options": options,
        "dep_prefix": DEP_PREFIX,
        "built_utc": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        **info,
    }


def write(ds: Dataset, out: Path) -> None:
    """Write a :class:`Dataset` to ``out`` (see module docstring for the file list)."""
    out.mkdir(parents=True, exist_ok=True)
    integer = not (ds.summary["options"]["tfidf"] or ds.summary["options"]["unit_norm"])
    for s in SPLITS:
        field_type = "integer" if integer else "real"
        scipy.io.mmwrite(out / f"X_{s}.mtx", ds.X[s], field=field_type)
        write_lines(out / f"labels_{s}.txt", [ds.classes[i] for i in ds.y[s]])
        write_lines(out / f"tags_{s}.txt", [TAG_SEP.join(row) for row in ds.tags[s]])
        write_lines(out / f"packages_{s}.txt", ds.names[s])
    write_lines(out / "classes.txt", ds.classes)
    (out / "summary.json").write_text(json.dumps(ds.summary, indent=1) + "\n")


def write_lines(path: Path, lines: list[str]) -> None:
    """Write one item per line (UTF-8, trailing newline)."""
    path.write_text("".join(line + "\n" for line in lines), encoding="utf-8")


def read_lines(path: Path) -> list[str]:
    """Read a file written by :func:`write_lines`."""
    return path.read_text(encoding="utf-8").split("\n")[:-1]


def load(out: Path) -> Dataset:
    """Load a data set written by :func:`write`.

    Parameters
    ----------
    out : Path
        Directory given as ``--out``.

    Returns
    -------
    Dataset
        CSR float64 matrices of shape (n_split, n_features) and the rest as built.
    """
    classes = read_lines(out / "classes.txt")
    X = {s: sp.csr_matrix(scipy.io.mmread(out / f"X_{s}.mtx"), dtype=np.float64) for s in SPLITS}
    lab = {s: read_lines(out / f"labels_{s}.txt") for s in SPLITS}
    y = {s: np.searchsorted(classes, lab[s]).astype(np.int64) for s in SPLITS}
    tags = {
        s: [r.split(TAG_SEP) if r else [] for r in read_lines(out / f"tags_{s}.txt")]
        for s in SPLITS
    }
    names = {s: read_lines(out / f"packages_{s}.txt") for s in SPLITS}
    summary = json.loads((out / "summary.json").read_text())
    return Dataset(X=X, y=y, tags=tags, names=names, classes=classes, summary=summary)


def main(argv: list[str] | None = None) -> None:
    """Command-line entry point."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--out", type=Path, required=True, help="output directory (keep out of repo)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--n-features", type=int, default=2**18)
    ap.add_argument("--tfidf", action="store_true", help="idf weights from the train split")
    ap.add_argument("--unit-norm", action="store_true", help="scale rows to unit L2 norm")
    ap.add_argument("--lists-dir", type=Path, default=LISTS_DIR)
    args = ap.parse_args(argv)
    ds = build(args.seed, args.n_features, args.tfidf, args.unit_norm, args.lists_dir)
    write(ds, args.out)
    s = ds.summary
    print(
        f"rows={s['rows']} cols={s['cols']} nnz={s['nnz']} classes={s['classes']} "
        f"tags={s['distinct_tags']} tagged_rows={s['tagged_rows']} "
        f"class_counts(min/median/max)={s['class_count_min_median_max']} "
        f"long_descriptions={s['long_descriptions']} -> {args.out}"
    )


if __name__ == "__main__":
    main()
