"""Building the components up front: size presets on any data, and one-line errors that say how
to fix a user ``_target_`` (a loader without the preset's keys, a module next to the user that
Python cannot see)."""

from __future__ import annotations

import os
import sys
import textwrap

import numpy as np
import pytest

from periodscan.cli import main
from periodscan.components import check_components
from periodscan.errors import ConfigError

TINY = ["experiment=tiny", "seeds=1"]


def _sweep(tmp_path, capsys, *overrides: str, config_dir=None) -> tuple[int, str, str]:
    options = ["--config-dir", str(config_dir)] if config_dir else []
    # Options go last: the CLI takes overrides after an option only if they contain "=".
    code = main(["sweep", *options, *TINY, f"results_dir={tmp_path / 'results'}", *overrides,
                 "--dry-run"])
    out, err = capsys.readouterr()
    return code, out, err


def _error_line(err: str) -> str:
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err  # one line, no traceback
    return lines[0]


@pytest.fixture
def cwd_off_path(tmp_path, monkeypatch):
    """Run in tmp_path with the current folder off sys.path, as the ``periodscan`` command is.

    (``python -m pytest`` puts the folder pytest started in on sys.path; the console script
    does not put the current folder there.)
    """
    folder = tmp_path / "work"
    folder.mkdir()
    monkeypatch.chdir(folder)
    here = {"", os.getcwd(), os.path.abspath(os.curdir)}
    monkeypatch.setattr(sys, "path", [p for p in sys.path if p not in here])
    return folder


# ---------------------------------------------------------------- size presets on any data


@pytest.mark.parametrize("data", [["data=digits", "model=cnn2d"], ["data=mnist1d"],
                                  ["data=waves"], ["data=patterns", "model=cnn2d"]])
def test_tiny_preset_with_builtin_data(tmp_path, capsys, data):
    code, out, err = _sweep(tmp_path, capsys, *data)
    assert code == 0, err
    assert "runs" in out and not (tmp_path / "results").exists()  # a dry run writes nothing


def test_tiny_preset_with_npz(tmp_path, capsys):
    rng = np.random.default_rng(0)
    np.savez(tmp_path / "mine.npz", x_train=rng.standard_normal((1500, 24)),
             y_train=np.arange(1500) % 3)
    code, _, err = _sweep(tmp_path, capsys, "data=npz", f"data.path={tmp_path / 'mine.npz'}")
    assert code == 0, err


def _write_loader(folder, module: str) -> None:
    """A user's loader that knows nothing of n_train / n_test."""
    (folder / f"{module}.py").write_text(textwrap.dedent("""\
        import numpy as np
        from periodscan.data import TensorData

        def load_mine(seed: int = 0):
            rng = np.random.default_rng(seed)
            x, y = rng.standard_normal((130, 1, 40)), np.arange(130) % 3
            return TensorData(x[:100], y[:100], x[100:], y[100:], num_classes=3, name="mine")
        """))
    configs = folder / "configs" / "data"
    configs.mkdir(parents=True)
    (configs / "mine.yaml").write_text(f"_target_: {module}.load_mine\nseed: 0\n")


def test_user_loader_without_size_keys_says_the_preset_set_them(tmp_path, capsys, monkeypatch):
    _write_loader(tmp_path, "loader_no_sizes")
    monkeypatch.syspath_prepend(str(tmp_path))
    configs = tmp_path / "configs"
    code, _, err = _sweep(tmp_path, capsys, "data=mine", config_dir=configs)
    assert code == 2
    assert _error_line(err) == (
        "periodscan: error: data: load_mine() got an unexpected keyword argument 'n_train' "
        "(a size preset such as experiment=tiny sets data.n_train and data.n_test; drop them "
        "with ~data.n_train ~data.n_test or give your loader those arguments)")
    # Following the advice works.
    code, _, err = _sweep(tmp_path, capsys, "data=mine", "~data.n_train", "~data.n_test",
                          config_dir=configs)
    assert code == 0, err


def test_unexpected_keyword_not_from_a_preset_keeps_the_plain_message(tmp_path, monkeypatch):
    _write_loader(tmp_path, "loader_plain_kw")
    monkeypatch.syspath_prepend(str(tmp_path))
    plain = _plain(tmp_path, data={"_target_": "loader_plain_kw.load_mine", "colour": "red"})
    with pytest.raises(ConfigError) as err:
        check_components(plain)
    assert str(err.value) == ("data: TypeError: load_mine() got an unexpected keyword argument "
                              "'colour'")


# ---------------------------------------------------------------- a module in the current folder


def _plain(tmp_path, **groups) -> dict:
    from conftest import tiny_config

    plain = tiny_config(tmp_path)
    plain["monitor"] = {}
    plain.update(groups)
    return plain


HINT = ("is in this folder but not on Python's import path: run with PYTHONPATH=. "
        "(e.g. PYTHONPATH=. periodscan sweep ...), or pip install -e the package it belongs to")


@pytest.mark.parametrize("group", ["data", "model", "deficit", "monitor"])
def test_target_in_current_folder_says_how_to_import_it(tmp_path, cwd_off_path, group):
    module = f"mine_{group}"
    (cwd_off_path / f"{module}.py").write_text("Thing = object\n")
    plain = _plain(tmp_path)
    plain[group] = {"_target_": f"{module}.Thing"}
    with pytest.raises(ConfigError) as err:
        check_components(plain)
    assert str(err.value) == (f"{group}._target_: cannot import '{module}.Thing' (No module "
                              f"named '{module}'); ./{module}.py {HINT}")


def test_package_folder_in_current_folder_gets_the_hint(tmp_path, capsys, cwd_off_path):
    (cwd_off_path / "mypkg_models").mkdir()
    (cwd_off_path / "mypkg_models" / "__init__.py").write_text("")
    code, _, err = _sweep(tmp_path, capsys, "model._target_=mypkg_models.nets.Net")
    assert code == 2
    assert _error_line(err).endswith(f"./mypkg_models/ {HINT}")


def test_no_hint_when_nothing_matches_or_the_file_itself_fails(tmp_path, capsys, cwd_off_path,
                                                               monkeypatch):
    code, _, err = _sweep(tmp_path, capsys, "model._target_=absent_models.Net")
    assert code == 2
    assert _error_line(err) == ("periodscan: error: model._target_: cannot import "
                                "'absent_models.Net' (No module named 'absent_models')")
    # The file is importable but imports something missing: PYTHONPATH is not the fix.
    (cwd_off_path / "broken_models.py").write_text("import not_installed_anywhere\n")
    monkeypatch.syspath_prepend(str(cwd_off_path))
    code, _, err = _sweep(tmp_path, capsys, "model._target_=broken_models.Net")
    assert code == 2
    line = _error_line(err)
    assert "not_installed_anywhere" in line and "PYTHONPATH" not in line


def test_pythonpath_advice_works(tmp_path, capsys, cwd_off_path, monkeypatch):
    """With the folder on the import path (what PYTHONPATH=. does), the same target builds."""
    _write_loader(cwd_off_path, "loader_here")
    mine = ["data=mine", "~data.n_train", "~data.n_test"]
    configs = cwd_off_path / "configs"
    code, _, err = _sweep(tmp_path, capsys, *mine, config_dir=configs)
    assert code == 2 and "./loader_here.py is in this folder" in err
    monkeypatch.syspath_prepend(str(cwd_off_path))
    code, _, err = _sweep(tmp_path, capsys, *mine, config_dir=configs)
    assert code == 0, err


# ---------------------------------------------------------------- labels that skip a class


def test_labels_one_to_six_warn_on_the_command_line(tmp_path, capsys):
    rng = np.random.default_rng(1)
    np.savez(tmp_path / "grades.npz", x_train=rng.standard_normal((120, 24)),
             y_train=np.arange(120) % 6 + 1)
    code, _, err = _sweep(tmp_path, capsys, "data=npz", f"data.path={tmp_path / 'grades.npz'}")
    assert code == 0, err
    assert "grades: 1 of 7 classes have no training example (class 0); labels run 1..6" in err
