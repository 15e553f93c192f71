"""The report: tables, PNG figures and a self-contained HTML page from a real tiny sweep."""

from __future__ import annotations

import re
import shutil
import sqlite3

import numpy as np
import pandas as pd
import pytest
import yaml
from PIL import Image
from test_api import build_tiny_sweep

from periodscan.analysis.readings import fisher_by_epoch
from periodscan.api import load_sweep
from periodscan.cli import main
from periodscan.jobs.prepare import prepare
from periodscan.views.figures import pick_windows


@pytest.fixture(scope="module")
def sweep_folder(tmp_path_factory):
    return build_tiny_sweep(tmp_path_factory.getbasetemp() / "shared_sweep")


@pytest.fixture
def copy(sweep_folder, tmp_path):
    target = tmp_path / "tiny"
    shutil.copytree(sweep_folder, target)
    return target


def _fake_fisher(folder):
    """Monitor readings on the clean trunk segments, as the Fisher monitor would write them."""
    conn = sqlite3.connect(folder / "ledger.sqlite")
    trunk = conn.execute("SELECT path, seed FROM runs WHERE is_baseline=1").fetchall()
    rows = []
    for path, seed in trunk:
        for sid in path.split(","):
            begin, end = conn.execute("SELECT begin_epoch, end_epoch FROM segments "
                                      "WHERE segment_id=?", (sid,)).fetchone()
            for epoch in range(begin, end):
                total = 10.0 * np.exp(-epoch / 3) + seed  # invented readings, for the test only
                rows += [(sid, epoch, "fisher/total", total),
                         (sid, epoch, "fisher/features.0", total / 2)]
    with conn:
        conn.executemany("INSERT OR REPLACE INTO extras VALUES (?, ?, ?, ?)", rows)
    conn.close()


def _images(page: str) -> list[str]:
    return re.findall(r"src='data:image/png;base64,([A-Za-z0-9+/=]+)'", page)


def test_report_writes_tables_figures_and_a_self_contained_page(copy):
    with load_sweep(copy) as view:
        files = view.report()
        table = view.table()
    names = {p.name for p in files.figures}
    assert names == {"sensitivity.png", "heatmap.png", "learning_curves.png"}
    for path in files.figures:
        with Image.open(path) as image:
            assert image.format == "PNG" and image.size[0] > 500
    # Tables round-trip: CSV and Parquet hold the same table the API gives.
    parquet = pd.read_parquet(files.parquet)
    pd.testing.assert_frame_equal(parquet, table, check_dtype=False)
    csv = pd.read_csv(files.csv)
    assert list(csv.columns) == list(table.columns)
    assert csv.damage.to_numpy() == pytest.approx(table.damage.to_numpy(), rel=1e-5)
    page = files.html.read_text()
    assert len(_images(page)) == 3  # every figure embedded
    assert not re.search(r"""(src|href)=['"]?(https?:|//|file:)""", page)  # nothing external
    for needle in ("Answer at a tolerance of 0.5 points", "Sensitivity table", "Reproduce",
                   "periodscan sweep tiny-test", "evidence, not a guarantee",
                   "recorded no Fisher information trace"):
        assert needle in page
    assert page.count("<tr class='v-") == len(table) == 6


def test_fisher_panel_when_the_ledger_has_readings(copy):
    with load_sweep(copy) as view:
        plain = view.report()
    plain_size = Image.open(copy / "sensitivity.png").size
    _fake_fisher(copy)
    with load_sweep(copy) as view:
        extras = view.extras
        fisher = fisher_by_epoch(extras)
        files = view.report()
    # Mean across seeds per epoch of fisher/total on the baselines (reading after epoch e sits
    # at e + 1 epochs completed); the invented readings are 10 exp(-e/3) + seed, seeds 0..2.
    expected = [10.0 * np.exp(-e / 3) + 1.0 for e in range(8)]
    assert list(fisher.epoch) == list(range(1, 9))
    assert fisher["mean"].to_numpy() == pytest.approx(expected)
    assert (fisher.seeds == 3).all()
    with_size = Image.open(copy / "sensitivity.png").size
    assert with_size[1] > plain_size[1]  # the extra panel
    assert "Fisher information trace of the clean baseline" in files.html.read_text()
    assert plain.html == files.html


def test_started_from_python_shows_config_instead_of_command(copy):
    conn = sqlite3.connect(copy / "ledger.sqlite")
    with conn:
        conn.execute("DELETE FROM meta WHERE key='command'")
        identity = conn.execute("SELECT value FROM meta WHERE key='identity'").fetchone()[0]
    conn.close()
    with load_sweep(copy) as view:
        page = view.report().html.read_text()
    assert "started from Python" in page and "periodscan.run_sweep(config)" in page
    # The config.yaml the page points to describes the very sweep in the ledger.
    config = yaml.safe_load((copy / "config.yaml").read_text())
    assert prepare(config).identity == identity


def test_partial_and_empty_sweeps_still_render(copy):
    conn = sqlite3.connect(copy / "ledger.sqlite")
    with conn:
        conn.execute("UPDATE runs SET status='pending', test_acc=NULL WHERE is_baseline=0 "
                     "AND start_epoch=4")
    conn.close()
    with load_sweep(copy) as view:
        page = view.report().html.read_text()
    assert "the numbers below are partial" in page and "2 unfinished" not in page
    assert "3 unfinished" in page
    conn = sqlite3.connect(copy / "ledger.sqlite")
    with conn:
        conn.execute("UPDATE runs SET status='pending', test_acc=NULL WHERE is_baseline=0")
    conn.close()
    with load_sweep(copy) as view:
        files = view.report()
    assert "No window run has finished yet" in files.html.read_text()


def test_pick_windows_and_cli(copy, capsys):
    with load_sweep(copy) as view:
        table = view.table()
    chosen = pick_windows(table)
    shortest = table[table.length == table.length.min()]
    assert (int(shortest.loc[shortest.damage.idxmax(), "start"]), 3) in chosen
    assert all(length == 3 for _, length in chosen) and len(chosen) <= 3
    assert main(["report", str(copy), "--tolerance", "1.5", "--curves", "0+4", "2+3"]) == 0
    out = capsys.readouterr().out
    assert "report.html" in out and "learning_curves.png" in out
    assert "tolerance of 1.5 points" in (copy / "report.html").read_text()
    with pytest.raises(SystemExit) as stop:
        main(["report", str(copy), "--curves", "zero"])
    assert stop.value.code == 2 and "START+LENGTH" in capsys.readouterr().err
