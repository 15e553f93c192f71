"""A user's own deficit and model plug in through ``_target_`` and a --config-dir folder."""

from __future__ import annotations

import pandas as pd

from periodscan.cli import main


def test_user_deficit_and_model_from_config_dir(tmp_path, capsys):
    configs = tmp_path / "myconfigs"
    (configs / "deficit").mkdir(parents=True)
    (configs / "model").mkdir()
    (configs / "deficit" / "signflip.yaml").write_text(
        "_target_: user_plugins.SignFlipHalf\nshare: 0.5\n")
    (configs / "model" / "tinynet.yaml").write_text(
        "_target_: user_plugins.TinyNet\nscale: 1.0\n")
    code = main(["sweep", "--config-dir", str(configs), "experiment=tiny", "deficit=signflip",
                 "model=tinynet", f"results_dir={tmp_path / 'results'}", "-q"])
    assert code == 0, capsys.readouterr().err
    table = pd.read_csv(tmp_path / "results" / "tiny" / "sensitivity.csv")
    assert len(table) == 3 and table.damage.notna().all()
    config = (tmp_path / "results" / "tiny" / "config.yaml").read_text()
    assert "user_plugins.SignFlipHalf" in config and "user_plugins.TinyNet" in config


LOADER = '''\
import numpy as np
from periodscan.data import TensorData


def load_bands(n_train, n_test, seed=0):  # no defaults: the preset must set both
    """Three classes of noisy signals told apart by which third of the signal is raised."""
    rng = np.random.default_rng(seed)
    y = np.arange(400) % 3
    x = rng.standard_normal((400, 1, 24)) * 0.5
    for k in range(3):
        x[y == k, :, 8 * k:8 * k + 8] += 1.0
    train, test = np.arange(300)[:n_train], np.arange(300, 400)[:n_test]
    return TensorData(x[train], y[train], x[test], y[test], num_classes=3, name="bands")
'''


def test_user_loader_that_takes_the_preset_sizes(tmp_path, capsys, monkeypatch):
    """A loader that accepts n_train / n_test gets the tiny preset's sizes and trains."""
    (tmp_path / "user_bands.py").write_text(LOADER)
    monkeypatch.syspath_prepend(str(tmp_path))  # what PYTHONPATH=. does for the command
    configs = tmp_path / "myconfigs" / "data"
    configs.mkdir(parents=True)
    (configs / "bands.yaml").write_text("_target_: user_bands.load_bands\nseed: 0\n")
    code = main(["sweep", "--config-dir", str(configs.parent), "experiment=tiny", "data=bands",
                 "data.n_test=60", f"results_dir={tmp_path / 'results'}", "-q"])
    assert code == 0, capsys.readouterr().err
    table = pd.read_csv(tmp_path / "results" / "tiny" / "sensitivity.csv")
    assert len(table) == 3 and table.damage.notna().all()
    config = (tmp_path / "results" / "tiny" / "config.yaml").read_text()
    assert "user_bands.load_bands" in config and "n_test: 60" in config
