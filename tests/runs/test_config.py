"""The one training configuration: its validator, saving and resuming.

No outside reference applies to these checks: they are the contract of the
settings (common practice, no source): each bad value is refused with one
message naming it, a saved configuration reads back equal, and a resume may
change only the budgets, tolerance and cadence.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from ranktide.errors import CheckpointError, ConfigError
from ranktide.runs.config import RESUME_MUTABLE, TrainConfig
from ranktide.solver.config import SolverConfig
from ranktide.solver.penalty import check_lam


@pytest.mark.parametrize("kw, msg", [
    ({"lam": 0.0}, r"lam = 0.0; give a positive number"),
    ({"lam": -1.0}, r"lam = -1.0; give a positive number"),
    ({"lam": math.nan}, r"lam = nan; give a positive number"),
    ({"lam_scale": 0.0}, r"lam_scale = 0.0; give a positive fraction"),
    ({}, r"give exactly one of lam, lam_scale and path_steps \(got none\)"),
    ({"lam": 0.1, "lam_scale": 0.1}, r"exactly one .* \(got lam, lam_scale\)"),
    ({"path_steps": 1, "has_valid": True}, r"path_steps = 1; give the number of lam"),
    ({"path_steps": 3}, r"a regularization path needs validation data"),
    ({"path_steps": 3, "has_valid": True, "path_floor": 1.5}, r"path_floor = 1.5"),
    ({"path_steps": 3, "has_valid": True, "path_extend": -1}, r"path_extend = -1"),
    ({"lam": 0.1, "tol": 0.0}, r"--tol 0.0: must lie in \(0, 1\)"),
    ({"lam": 0.1, "max_passes": 0}, r"--max-passes 0: must be >= 1"),
    ({"lam": 0.1, "block_rows": 0}, r"--block-rows 0: must be >= 1"),
    ({"lam": 0.1, "max_seconds": 0}, r"--max-seconds 0: must be > 0"),
    ({"lam": 0.1, "checkpoint_seconds": -5}, r"--checkpoint-seconds -5: must be > 0"),
    ({"lam": 0.1, "checkpoint_passes": 0}, r"--checkpoint-passes 0: must be >= 1"),
    ({"lam": 0.1, "seed": 1.5}, r"seed = 1.5; give a whole number"),
    ({"lam": 0.1, "loss": "squared", "class_weight": "balanced"}, r"softmax loss only"),
    ({"lam": 0.1, "loss": "hinge"}, r"loss 'hinge': unknown"),
])
def test_each_bad_setting_is_one_message(kw, msg):
    kw = {"loss": "softmax", **kw}
    with pytest.raises(ConfigError, match=msg):
        TrainConfig(**kw)


def test_lam_is_checked_by_one_function_for_the_run_and_the_solver():
    for bad in (0.0, -2.0, math.inf):
        with pytest.raises(ConfigError, match="give a positive number") as a:
            check_lam(bad, None)
        with pytest.raises(ConfigError, match="give a positive number") as b:
            SolverConfig(loss="softmax", lam=bad)
        assert str(a.value).split(": ", 1)[1] == str(b.value).split(": ", 1)[1]


def test_settings_round_trip_through_json():
    cfg = TrainConfig(loss="softmax", path_steps=4, has_valid=True, valid="v.zarr", path_extend=2,
                      class_weight=np.array([1.0, 2.0, 0.5]), memory="2GB", max_seconds=30.0)
    again = TrainConfig.from_settings(json.loads(json.dumps(cfg.settings())))
    assert again == cfg
    kw = again.train_kwargs()
    assert "has_valid" not in kw and kw["valid"] == "v.zarr"
    np.testing.assert_array_equal(kw["class_weight"], [1.0, 2.0, 0.5])


def test_old_run_settings_read_with_their_resolved_class_weights():
    old = {"loss": "softmax", "lam": 0.2, "tol": 1e-4, "max_passes": 50, "seed": 3,
           "class_weight": "balanced", "class_weights": [0.5, 1.5], "momentum": 3}
    cfg = TrainConfig.from_settings(old)
    assert cfg.class_weight == (0.5, 1.5) and cfg.seed == 3 and cfg.path_extend == 0
    # the earlier names of the path settings and of the penalty's scale
    older = {"loss": "softmax", "path": 4, "path_min_frac": 0.01, "valid": "v.zarr"}
    cfg = TrainConfig.from_settings(older)
    assert (cfg.path_steps, cfg.path_floor, cfg.has_valid) == (4, 0.01, True)
    assert TrainConfig.from_settings({"loss": "squared", "lam_frac": 0.3}).lam_scale == 0.3


def test_resume_changes_only_the_mutable_settings():
    cfg = TrainConfig(loss="softmax", lam=0.1)
    new = cfg.with_changes({"tol": 1e-6, "max_passes": 500})
    assert new.tol == 1e-6 and new.max_passes == 500 and new.lam == cfg.lam
    with pytest.raises(CheckpointError, match=r"lam, seed cannot change on resume"):
        cfg.with_changes({"seed": 2, "lam": 0.3})
    with pytest.raises(ConfigError, match=r"--tol 2.0: must lie in"):
        cfg.with_changes({"tol": 2.0})
    assert {"tol", "max_passes", "max_seconds"} <= RESUME_MUTABLE
