"""The ``sweep`` job as a library call: plan, check, train what is missing, write the table.

``run_sweep`` is what the CLI verb calls and what a notebook calls; it returns DataFrames.
"""

from __future__ import annotations

import errno
import json
import os
import sqlite3
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
from omegaconf import DictConfig, OmegaConf

from periodscan.analysis.sensitivity import sensitivity_table
from periodscan.components import check_components
from periodscan.config import (
    TRAINING_KEYS,
    compose_config,
    plan_runs,
    results_folder,
    seed_list,
    to_plain,
    training_identity,
)
from periodscan.engine.checkpoint import remove_temporaries, write_atomic
from periodscan.engine.executors import make_executor
from periodscan.engine.lock import FolderLock
from periodscan.engine.runner import CHECKPOINT_DIR, execute, kill_point
from periodscan.engine.segment import SegmentJob, run_segment
from periodscan.engine.tree import RunTree, build_tree
from periodscan.errors import PeriodscanError, SweepError
from periodscan.ledger import Ledger
from periodscan.plots import sensitivity_curve
from periodscan.terminal import format_tree

TABLE_CSV = "sensitivity.csv"
CURVE_PNG = "sensitivity.png"


@dataclass
class Prepared:
    """A validated sweep: plain config, its run tree and where it writes."""

    plain: dict[str, Any]
    tree: RunTree
    folder: Path
    identity: str
    seeds: list[int]


@dataclass
class SweepOutcome:
    """What a finished (or partly failed) sweep hands back."""

    folder: Path
    table: pd.DataFrame
    runs: pd.DataFrame
    counts: dict[str, int]
    epochs_shared: int
    epochs_unshared: int
    seconds: float


def plain_config(config: DictConfig | dict | Sequence[str]) -> dict[str, Any]:
    """A composed config, a plain dict or Hydra override strings, as resolved plain dicts."""
    if isinstance(config, DictConfig):
        return to_plain(config)
    if isinstance(config, dict):
        return to_plain(OmegaConf.create(config))
    return to_plain(compose_config(list(config)))


def prepare(config: DictConfig | dict | Sequence[str]) -> Prepared:
    """Accept a composed config, a plain dict or Hydra override strings; validate everything."""
    plain = plain_config(config)
    runs = plan_runs(plain)
    check_components(plain)
    identity = training_identity(plain)
    return Prepared(plain, build_tree(runs, identity), results_folder(plain), identity,
                    seed_list(plain))


def _open_ledger(prep: Prepared) -> Ledger:
    """Open (or create) the ledger, refusing a folder written under a different training config."""
    existing = (prep.folder / "ledger.sqlite").exists()
    if not existing and prep.folder.exists() and any(
            p.name not in ("sweep.lock",) for p in prep.folder.iterdir()):
        raise SweepError(f"results folder {prep.folder} exists and is not a periodscan sweep; "
                         "choose another name=")
    try:
        ledger = Ledger(prep.folder)
        known = ledger.get_meta("identity")
    except sqlite3.DatabaseError as err:
        if "not a database" not in str(err) and "malformed" not in str(err):
            raise
        raise SweepError(f"the ledger {prep.folder / 'ledger.sqlite'} is damaged ({err}); move "
                         "it away to start this sweep over, or use a new name=...") from None
    if known is not None and known != prep.identity:
        before = json.loads(ledger.get_meta("training") or "{}")
        changed = [k for k in TRAINING_KEYS if before.get(k) != prep.plain[k]]
        ledger.close()
        raise SweepError(
            f"results folder {prep.folder} holds a sweep trained under another config "
            f"(differs in: {', '.join(changed) or 'engine or thread count'}); "
            "use a new name=... or delete that folder"
        )
    if known is None:
        ledger.set_meta(identity=prep.identity,
                        training={k: prep.plain[k] for k in TRAINING_KEYS},
                        created=time.time())
    return ledger


def run_sweep(config: DictConfig | dict | Sequence[str] = (), quiet: bool = False,
              command: str | None = None) -> SweepOutcome:
    """Run (or resume) a sweep and write its ledger, table and curve into its folder.

    ``command`` is the shell command that started it (the CLI passes it); the report shows it
    as the way to reproduce the sweep. A results folder that cannot be written (no space, no
    permission) raises SweepError; the ledger stays consistent, so the same call resumes.
    """
    prep = prepare(config)
    started = time.perf_counter()
    try:
        prep.folder.mkdir(parents=True, exist_ok=True)
        with FolderLock(prep.folder):
            table, runs, counts = _run_locked(prep, quiet, command)
    except (OSError, sqlite3.Error) as err:
        raise SweepError(_storage_message(prep.folder, err)) from None
    return SweepOutcome(prep.folder, table, runs, counts, prep.tree.epochs_shared,
                        prep.tree.epochs_unshared, time.perf_counter() - started)


def _run_locked(prep: Prepared, quiet: bool, command: str | None):
    """The sweep proper, under the folder lock: nothing is written before the executor is up."""
    threads = int(prep.plain["executor"].get("threads_per_worker", 1))
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    ledger = _open_ledger(prep)
    remove_temporaries(prep.folder, prep.folder / CHECKPOINT_DIR)
    try:
        executor = make_executor(prep.plain["executor"])
        try:
            if command:
                ledger.set_meta(command=command)
            ledger.register(prep.tree.segments.values(), prep.tree.runs.values(),
                            prep.tree.paths, prep.identity)
            write_atomic(prep.folder / "config.yaml",
                         OmegaConf.to_yaml(OmegaConf.create(prep.plain)).encode())
            counts = execute(prep.tree, ledger, prep.folder, training, executor, threads,
                             quiet=quiet, monitor=prep.plain.get("monitor"))
        except BaseException:
            executor.close(abort=True)
            raise
        executor.close()
        runs = ledger.runs_frame()
        runs = runs[runs.run_id.isin(prep.tree.runs)]
        kill_point("before-outputs")
        table = write_outputs(prep, runs)
    finally:
        ledger.close()
    return table, runs, counts


def _storage_message(folder: Path, err: OSError | sqlite3.Error) -> str:
    """One line for a results folder that cannot be written: what failed and what to do."""
    text = str(err).lower()
    if isinstance(err, OSError):
        what = f"{err.strerror or err}" + (f": {err.filename}" if err.filename else "")
        full = err.errno == errno.ENOSPC or err.errno == errno.EDQUOT
        denied = err.errno in (errno.EACCES, errno.EPERM, errno.EROFS)
    else:
        what = f"ledger: {err}"
        full = "full" in text
        denied = "readonly" in text or "unable to open" in text
    if full:
        advice = "free some space, then rerun the same command to resume"
    elif denied:
        advice = "choose a writable results_dir=... or fix the folder's permissions"
    elif isinstance(err, OSError) and err.errno in (errno.ENOTDIR, errno.EEXIST):
        advice = "a file stands where a folder must be; check the results_dir=... path"
    else:
        advice = "fix the results folder, then rerun the same command to resume"
    return f"results folder {folder} cannot be written ({what}); {advice}"


def write_outputs(prep: Prepared, runs: pd.DataFrame) -> pd.DataFrame:
    """Sensitivity CSV and PNG for the runs of this design."""
    plain = prep.plain
    epochs = int(plain["schedule"]["epochs"])
    removal = plain["design"]["kind"] == "removal"
    table = sensitivity_table(runs, epochs, float(plain.get("confidence", 0.95)),
                              tolerance=plain.get("tolerance"),
                              family="all" if removal else "length")
    write_atomic(prep.folder / TABLE_CSV, table.to_csv(index=False, float_format="%.4f").encode())
    if len(table):
        tmp = prep.folder / f".{CURVE_PNG}.tmp.png"
        sensitivity_curve(table, tmp, title=describe(plain),
                          removal=removal,
                          tolerance=plain.get("tolerance"), epochs=None)
        os.replace(tmp, prep.folder / CURVE_PNG)
    return table


def describe(plain: dict[str, Any]) -> str:
    """One-line title: deficit, data and model targets by their short names."""
    def short(group: str) -> str:
        return str(plain[group].get("_target_", "?")).rsplit(".", 1)[-1]
    return f"{short('deficit')} on {short('data')} / {short('model')}, {plain['name']}"


def dry_run(config: DictConfig | dict | Sequence[str] = (), calibrate: bool = True) -> str:
    """Describe the run tree, epochs with and without sharing, and an estimated time."""
    prep = prepare(config)
    tree = prep.tree
    workers = prep.plain["executor"].get("workers") or os.cpu_count() or 1
    if prep.plain["executor"]["kind"] == "serial":
        workers = 1
    lines = [format_tree(tree, prep.seeds), ""]
    n_windows = sum(1 for r in tree.runs.values() if not r.is_baseline)
    n_base = len(tree.runs) - n_windows
    lines.append(f"{len(tree.runs)} runs ({n_windows} window runs, {n_base} baselines) over "
                 f"{len(prep.seeds)} seeds, {len(tree.segments)} segments")
    lines.append(f"epochs to train: {tree.epochs_shared} with sharing, "
                 f"{tree.epochs_unshared} trained one by one from scratch "
                 f"(saving x{tree.epochs_unshared / max(tree.epochs_shared, 1):.2f})")
    if calibrate:
        per_epoch = _time_one_epoch(prep)
        chain = max(tree.critical_path(r.segment_id) for r in tree.roots())
        seconds = max(tree.epochs_shared / workers, chain) * per_epoch
        lines.append(f"one epoch takes about {per_epoch:.3g} s on this machine now; estimated "
                     f"wall time with {workers} worker(s): {_human(seconds)}")
    lines.append(f"results folder: {prep.folder}")
    return "\n".join(lines)


def _time_one_epoch(prep: Prepared) -> float:
    training = {k: prep.plain[k] for k in TRAINING_KEYS}
    threads = int(prep.plain["executor"].get("threads_per_worker", 1))
    job = SegmentJob(segment_id="calibration", config=training, seed=prep.seeds[0], begin=0,
                     end=3, deficit_on=False, parent_checkpoint=None, keep_checkpoint=False,
                     evaluate_at_end=False, threads=threads)
    result = run_segment(job)
    if result.error:
        raise PeriodscanError(f"a trial epoch failed: {result.error.strip().splitlines()[-1]}")
    return min(e.seconds for e in result.epochs[1:])  # the first epoch pays one-off warm-up


def _human(seconds: float) -> str:
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"
