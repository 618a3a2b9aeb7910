"""Test helper: rows of one small planted rank-2 softmax problem (40 features, 5 classes).

The model is fixed (seeds 0 and 1); ``seed`` picks the rows, so two seeds give a
training and a validation part of the same problem.
"""

from __future__ import annotations

import numpy as np
import scipy.sparse as sp


def planted_rows(seed: int, n: int) -> tuple[sp.csr_matrix, np.ndarray]:
    """``n`` rows (CSR float32, (n, 40)) and their class ids (n,) int32."""
    W = np.random.default_rng(0).standard_normal((40, 2)) @ \
        np.random.default_rng(1).standard_normal((2, 5))
    rng = np.random.default_rng(seed)
    X = sp.random(n, 40, density=0.2, format="csr", random_state=seed, dtype=np.float32)
    y = np.argmax(X @ W + 0.3 * rng.standard_normal((n, 5)), axis=1).astype(np.int32)
    return X, y
