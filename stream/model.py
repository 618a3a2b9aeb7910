"""Model files: the factored weight matrix W = U diag(s) V^T, the intercept, and metadata.

A model directory holds

* ``factors.npz``: ``U_rows`` (m,) int64, the sorted ids of the rows of ``U`` that
  are not zero (hashed feature ids that never occur in the training data give zero
  rows: they are not stored), ``U`` (m, r) those rows, ``s`` (r,), ``V`` (k, r),
  ``b`` (k,); ``U`` and ``V`` in float64 or, when asked, float32 (``s`` and ``b``
  always float64); written without pickle (:func:`ranktide.atomic.save_npz`).
  Format version 1 stored the whole ``U`` (d, r) in float64 and no ``U_rows``:
  such directories still load;
* ``model.json``: format name and version, loss, shapes, the output names in
  column order (under ``classes``, ``tags`` or ``outputs`` by loss), and the
  fit's figures (lam, lam_max, store fingerprint, objective, gap estimate,
  sigma_ratio, passes, seconds) and package versions.

The directory is built under a temporary name and renamed into place, so a
half-written model never appears under the final name.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from importlib import metadata as _metadata
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import scipy.sparse as sp
from ranktide import __version__
from ranktide.atomic import atomic_dir, atomic_write_json, load_npz, save_npz
from ranktide.errors import ConfigError, InputError, ModelError
from ranktide.jsondata import json_data
from ranktide.kernels.sparse import csr_matmul_dense
from ranktide.kernels.svd import svd
from ranktide.losses import LOSS_NAMES, get_loss

__all__ = ["Model", "TopK", "save_model", "load_model", "MODEL_FORMAT", "MODEL_VERSION",
           "NAMES_KEY", "FACTOR_DTYPES", "stored_rows"]

MODEL_FORMAT = "ranktide-model"
MODEL_VERSION = 2
#: dtypes in which save_model may store U and V (s and b are always float64)
FACTOR_DTYPES = ("float64", "float32")
FACTORS_FILE = "factors.npz"
META_FILE = "model.json"
#: key under which model.json lists the output names, by loss (the loss object's names_key)
NAMES_KEY: dict[str, str] = {name: get_loss(name).names_key for name in LOSS_NAMES}
_ARRAYS = ("U", "s", "V", "b")
# keys of model.json that save_model owns; everything else comes from the metadata
_STRUCTURAL = ("format", "format_version", "loss", "d", "k", "rank", "versions", "factors",
               *NAMES_KEY.values())
_VERSIONED = ("numpy", "scipy", "numba", "zarr", "h5py")


class TopK(NamedTuple):
    """The best outputs of each row (:meth:`Model.top_k`), best first."""

    labels: np.ndarray
    scores: np.ndarray
    indices: np.ndarray


@dataclass(frozen=True, eq=False)
class Model:
    """A fitted model: W = U diag(s) V^T (never formed) and the intercept b.

    Parameters
    ----------
    U : ndarray, shape (d, r)
        Left factor (orthonormal columns from the solver).
    s : ndarray, shape (r,)
        Singular values, >= 0.
    V : ndarray, shape (k, r)
        Right factor.
    b : ndarray, shape (k,)
        Intercept.
    loss : {"softmax", "squared", "multilabel"}
    names : list of str, optional
        Output names in column order (classes, tags or outputs).
    meta : dict
        Fit figures and provenance (lam, lam_max, objective, gap, ...).
    """

    U: np.ndarray
    s: np.ndarray
    V: np.ndarray
    b: np.ndarray
    loss: str
    names: list[str] | None = None
    meta: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        arrays = _check_factors(
            {"U": self.U, "s": self.s, "V": self.V, "b": self.b}, where="model"
        )
        for key, arr in arrays.items():
            object.__setattr__(self, key, arr)
        if self.loss not in NAMES_KEY:
            raise ModelError(
                f"model: unknown loss {self.loss!r}; expected one of {', '.join(NAMES_KEY)}"
            )
        if self.names is not None:
            object.__setattr__(self, "names", _check_names(self.names, self.n_outputs, "model"))
        object.__setattr__(self, "meta", dict(self.meta))

    # ------------------------------------------------------------------ shapes

    @property
    def n_features(self) -> int:
        """d, the number of input columns."""
        return int(self.U.shape[0])

    @property
    def n_outputs(self) -> int:
        """k, the number of classes, tags or outputs."""
        return int(self.V.shape[0])

    @property
    def rank(self) -> int:
        """r, the number of atoms."""
        return int(self.s.shape[0])

    @classmethod
    def from_dense(
        cls,
        W: np.ndarray,
        b: np.ndarray,
        *,
        loss: str,
        names: Sequence[str] | None = None,
        meta: Mapping[str, Any] | None = None,
        rtol: float = 1e-12,
    ) -> Model:
        """Factor a dense W (d, k) by SVD, dropping singular values <= rtol * s_1."""
        W = np.asarray(W, dtype=np.float64)
        U, s, Vt = svd(W)
        keep = s > (rtol * s[0] if s.size else 0.0)
        keep &= s > 0
        return cls(U=U[:, keep], s=s[keep], V=Vt[keep].T, b=np.asarray(b, dtype=np.float64),
                   loss=loss, names=None if names is None else list(names),
                   meta=dict(meta or {}))

    # ------------------------------------------------------------------ prediction

    def scores(self, X: Any) -> np.ndarray:
        """Scores X W + b, computed as (X U) (diag(s) V^T) + b without forming W.

        Parameters
        ----------
        X : scipy sparse matrix or ndarray, shape (n, d)

        Returns
        -------
        ndarray, shape (n, k), float64
        """
        XU = self._project(X)
        out = XU @ (self.s[:, None] * self.V.T)
        out += self.b
        return out

    def predict_proba(self, X: Any) -> np.ndarray:
        """Class probabilities (softmax) or tag probabilities (sigmoid), shape (n, k).

        Raises
        ------
        ConfigError
            For the squared loss, which has no probabilities.
        """
        loss = get_loss(self.loss)
        if not loss.has_probabilities:
            return loss.probabilities(np.empty((0, 0)))  # raises: values, not probabilities
        return loss.probabilities(self.scores(X))

    def predict(self, X: Any) -> Any:
        """Predictions: class ids (n,) int64 (softmax), a CSR (n, k) tag indicator of the
        tags whose probability is >= 0.5 (multilabel), or values (n, k) float64 (squared)."""
        return get_loss(self.loss).predict(self.scores(X))

    def top_k(self, X: Any, k: int) -> TopK:
        """The k best-scoring outputs of each row, best first (ties: lower index first).

        Returns
        -------
        TopK
            ``labels`` (n, k) str: the outputs' names (their ids as text when
            the model has no names); ``scores`` (n, k) float64; ``indices``
            (n, k) int64: the output columns.
        """
        if not (isinstance(k, (int, np.integer)) and 1 <= k <= self.n_outputs):
            raise ConfigError(f"top_k: k = {k!r} must be an integer in 1..{self.n_outputs}")
        Z = self.scores(X)
        order = np.argsort(-Z, axis=1, kind="stable")[:, :k].astype(np.int64)
        names = np.asarray(self.names if self.names is not None else
                           [str(j) for j in range(self.n_outputs)], dtype=str)
        return TopK(labels=names[order], scores=np.take_along_axis(Z, order, axis=1),
                    indices=order)

    def _project(self, X: Any) -> np.ndarray:
        """X U, shape (n, r), float64."""
        if not sp.issparse(X):
            X = np.asarray(X, dtype=np.float64)
        if X.ndim != 2:
            raise InputError(f"X: expected a 2-D matrix of rows x features, got {X.ndim}-D")
        if X.shape[1] != self.n_features:
            raise InputError(
                f"X: has {X.shape[1]} columns but the model was fitted on {self.n_features} "
                "features; use data with the same feature columns"
            )
        n = X.shape[0]
        out = np.zeros((n, self.rank), dtype=np.float64)
        if self.rank == 0 or n == 0:
            return out
        if sp.issparse(X):
            Xc = sp.csr_matrix(X)
            data = Xc.data
            if data.dtype not in (np.float32, np.float64):
                data = data.astype(np.float64)
            return csr_matmul_dense(Xc.indptr, Xc.indices, data, self.U, out, where="X")
        return X @ self.U


# --------------------------------------------------------------------------- validation


def _check_factors(arrays: Mapping[str, Any], *, where: str) -> dict[str, np.ndarray]:
    """Check dtypes and mutually consistent shapes of U, s, V, b; return float64 copies."""
    out: dict[str, np.ndarray] = {}
    for key in _ARRAYS:
        if key not in arrays:
            raise ModelError(f"{where}: array {key!r} is missing; re-save the model")
        arr = np.asarray(arrays[key])
        if arr.dtype.hasobject or not (np.issubdtype(arr.dtype, np.floating)
                                       or np.issubdtype(arr.dtype, np.integer)):
            raise ModelError(
                f"{where}: array {key!r} has dtype {arr.dtype}, not a real number type; "
                "re-save the model"
            )
        arr = np.array(arr, dtype=np.float64, order="C")
        if not np.all(np.isfinite(arr)):
            raise ModelError(f"{where}: array {key!r} holds NaN or infinite values; refit")
        out[key] = arr
    U, s, V, b = (out[key] for key in _ARRAYS)
    if U.ndim != 2 or V.ndim != 2 or s.ndim != 1 or b.ndim != 1:
        raise ModelError(
            f"{where}: expected U (d, r), s (r,), V (k, r), b (k,); got shapes "
            f"{U.shape}, {s.shape}, {V.shape}, {b.shape}"
        )
    r = s.shape[0]
    if U.shape[1] != r or V.shape[1] != r or V.shape[0] != b.shape[0]:
        raise ModelError(
            f"{where}: inconsistent shapes U {U.shape}, s {s.shape}, V {V.shape}, b {b.shape}; "
            "need U (d, r), s (r,), V (k, r), b (k,)"
        )
    if np.any(s < 0):
        raise ModelError(f"{where}: singular value {int(np.argmin(s))} is negative; refit")
    return out


def _check_names(names: Any, k: int, where: str) -> list[str]:
    if isinstance(names, (str, bytes)) or not isinstance(names, Sequence):
        raise ModelError(f"{where}: output names must be a list of {k} strings")
    names = list(names)
    if len(names) != k:
        raise ModelError(f"{where}: {len(names)} output names for {k} outputs; give one each")
    for i, nm in enumerate(names):
        if not isinstance(nm, str):
            raise ModelError(f"{where}: output name {i} is {nm!r}, not a string")
    return names


def _versions() -> dict[str, str | None]:
    out: dict[str, str | None] = {}
    for pkg in _VERSIONED:
        try:
            out[pkg] = _metadata.version(pkg)
        except _metadata.PackageNotFoundError:
            out[pkg] = None
    out["ranktide"] = __version__
    return out


# --------------------------------------------------------------------------- files


def save_model(
    path: str | Path,
    model: Model,
    *,
    meta: Mapping[str, Any] | None = None,
    overwrite: bool = False,
    factor_dtype: str = "float64",
) -> Path:
    """Write ``model`` to the directory ``path`` (built under a temporary name, then renamed).

    Only the non-zero rows of ``U`` are stored (with their sorted row ids), so a
    model over hashed features takes space for the features the data has, not
    for all ``d``.

    Parameters
    ----------
    path : path
        The model directory to create.
    model : Model
    meta : mapping, optional
        Fit figures merged over ``model.meta``: lam, lam_max, store_fingerprint,
        objective, gap, sigma_ratio, passes, seconds, and any other JSON data.
    overwrite : bool
        Replace an existing directory (otherwise OutputExistsError).
    factor_dtype : {"float64", "float32"}
        Storage type of ``U`` and ``V``. ``float64`` (default) loads back bit for
        bit; ``float32`` halves the file. Measured on the digits test model and the
        real-data benchmark: the same top-1 class on every row and probabilities
        within 1e-5 of the float64 model (tests/test_model.py checks 1e-4).

    Returns
    -------
    Path
        The final directory.
    """
    if factor_dtype not in FACTOR_DTYPES:
        raise ConfigError(f"save_model: factor_dtype {factor_dtype!r}; choose one of "
                          f"{', '.join(FACTOR_DTYPES)}")
    rows = stored_rows(model.U)
    merged = {**model.meta, **dict(meta or {})}
    doc: dict[str, Any] = {}
    for key in ("lam", "lam_max", "store_fingerprint", "objective", "gap", "sigma_ratio",
                "passes", "seconds"):
        doc[key] = None
    for key, value in merged.items():
        if key in _STRUCTURAL:
            continue
        doc[str(key)] = json_data(value, f"model metadata {key!r}")
    doc.update({
        "format": MODEL_FORMAT,
        "format_version": MODEL_VERSION,
        "loss": model.loss,
        "d": model.n_features,
        "k": model.n_outputs,
        "rank": model.rank,
        "factors": {"dtype": factor_dtype, "stored_rows": int(rows.size),
                    "zero_rows_left_out": model.n_features - int(rows.size)},
        NAMES_KEY[model.loss]: model.names,
        "versions": _versions(),
    })
    final = Path(path)
    arrays = {"U_rows": rows, "U": model.U[rows].astype(factor_dtype), "s": model.s,
              "V": model.V.astype(factor_dtype), "b": model.b}
    with atomic_dir(final, overwrite=overwrite) as tmp:
        tmp.mkdir()
        save_npz(tmp / FACTORS_FILE, arrays)
        atomic_write_json(tmp / META_FILE, doc)
    return final


def load_model(path: str | Path) -> Model:
    """Read and validate a model directory written by :func:`save_model`.

    Raises
    ------
    ModelError
        One line naming the file and the problem: missing directory or files,
        unreadable JSON, another format or a newer version, unknown loss,
        object arrays, inconsistent shapes or names.
    """
    p = Path(path)
    if not p.is_dir():
        what = "is a file, not a model directory" if p.exists() else "no such model directory"
        raise ModelError(f"{p}: {what}; pass the directory written by train")
    doc = _read_meta(p / META_FILE)
    loss = doc.get("loss")
    if loss not in NAMES_KEY:
        raise ModelError(
            f"{p / META_FILE}: unknown loss {loss!r}; expected one of {', '.join(NAMES_KEY)}"
        )
    arrays = load_npz(p / FACTORS_FILE, error=ModelError)
    where = str(p / FACTORS_FILE)
    checked = _check_factors(arrays, where=where)
    if "U_rows" in arrays:  # format 2: the non-zero rows of U and their ids
        checked["U"] = _expand_rows(arrays["U_rows"], checked["U"], doc.get("d"), where)
    d, r = checked["U"].shape
    k = checked["V"].shape[0]
    for key, have in (("d", d), ("k", k), ("rank", r)):
        if doc.get(key) != have:
            raise ModelError(
                f"{p / META_FILE}: {key} = {doc.get(key)!r} but {FACTORS_FILE} has {key} = "
                f"{have}; the files do not belong together, re-save the model"
            )
    names = doc.get(NAMES_KEY[loss])
    if names is not None:
        names = _check_names(names, k, str(p / META_FILE))
    meta = {key: val for key, val in doc.items() if key not in _STRUCTURAL}
    meta["versions"] = doc.get("versions")
    return Model(U=checked["U"], s=checked["s"], V=checked["V"], b=checked["b"], loss=loss,
                 names=names, meta=meta)


def stored_rows(U: np.ndarray) -> np.ndarray:
    """Sorted ids (int64) of the rows of ``U`` (d, r) that hold a non-zero entry."""
    return np.flatnonzero(np.any(np.asarray(U) != 0, axis=1)).astype(np.int64)


def _expand_rows(rows: Any, U_rows: np.ndarray, d: Any, where: str) -> np.ndarray:
    """The full ``U`` (d, r) from its stored rows; checks ids and shapes first.

    Parameters
    ----------
    rows : array, shape (m,)
        Sorted, distinct row ids in ``0..d-1``.
    U_rows : ndarray, shape (m, r)
        Those rows.
    d : int
        ``d`` from model.json.
    """
    rows = np.asarray(rows)
    if not isinstance(d, int) or isinstance(d, bool) or d < 1:
        raise ModelError(f"{where}: model.json gives d = {d!r}, not a positive integer; "
                         "re-save the model")
    if rows.ndim != 1 or not np.issubdtype(rows.dtype, np.integer):
        raise ModelError(f"{where}: U_rows must be a 1-D integer array, got {rows.dtype} "
                         f"{rows.shape}; re-save the model")
    if rows.shape[0] != U_rows.shape[0]:
        raise ModelError(f"{where}: {rows.shape[0]} row ids for {U_rows.shape[0]} rows of U; "
                         "re-save the model")
    if rows.size and (rows[0] < 0 or rows[-1] >= d or np.any(np.diff(rows) <= 0)):
        raise ModelError(f"{where}: U_rows must be increasing ids in 0..{d - 1}; "
                         "re-save the model")
    full = np.zeros((d, U_rows.shape[1]), dtype=np.float64)
    full[rows] = U_rows
    return full


def _read_meta(path: Path) -> dict[str, Any]:
    if not path.is_file():
        raise ModelError(f"{path}: file not found; the model directory is incomplete")
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ModelError(f"{path}: not readable JSON ({msg}); re-save the model") from None
    if not isinstance(doc, dict):
        raise ModelError(f"{path}: expected a JSON object; re-save the model")
    if doc.get("format") != MODEL_FORMAT:
        raise ModelError(
            f"{path}: format {doc.get('format')!r} is not {MODEL_FORMAT!r}; not a ranktide model"
        )
    version = doc.get("format_version")
    if not isinstance(version, int) or isinstance(version, bool) or version < 1:
        raise ModelError(f"{path}: format_version {version!r} is not a positive integer")
    if version > MODEL_VERSION:
        raise ModelError(
            f"{path}: format version {version} is newer than this ranktide reads "
            f"({MODEL_VERSION}); upgrade ranktide"
        )
    return doc
