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
