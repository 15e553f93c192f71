"""Shared fixtures: a tiny but real training config that runs in about a second per sweep."""

from __future__ import annotations

import copy

import pytest


def tiny_config(tmp_path, **changes) -> dict:
    """A plain config dict: mnist1d signals (600 train), 8 epochs, CNN with BatchNorm + dropout."""
    cfg = {
        "data": {"_target_": "periodscan.data.mnist1d.load_mnist1d", "n_train": 600,
                 "n_test": 300},
        "model": {"_target_": "periodscan.models.CNN1d", "channels": 16, "batchnorm": True,
                  "dropout": 0.2},
        "deficit": {"_target_": "periodscan.deficits.Blur", "sigma": 2.0},
        "design": {"kind": "window", "starts": [0, 2, 4], "lengths": [3, 4],
                   "budget": "fixed_total", "recovery_epochs": None},
        "schedule": {"epochs": 8, "batch_size": 100,
                     "optimizer": {"name": "sgd", "lr": 0.05, "momentum": 0.9,
                                   "weight_decay": 5e-4},
                     "lr_schedule": {"kind": "exponential", "gamma": 0.97},
                     "augment": {"max_shift": 0, "hflip": False}},
        "executor": {"kind": "serial", "workers": 1, "threads_per_worker": 1},
        "name": "tiny", "results_dir": str(tmp_path / "results"), "seeds": 2,
        "confidence": 0.95, "tolerance": 0.5,
    }
    for dotted, value in changes.items():
        node = cfg
        *parents, leaf = dotted.split("__")
        for key in parents:
            node = node[key]
        node[leaf] = copy.deepcopy(value)
    return cfg


@pytest.fixture
def make_config(tmp_path):
    """Factory: make_config(design__kind="removal", seeds=1) with '__' as the key separator."""
    return lambda **changes: tiny_config(tmp_path, **changes)
