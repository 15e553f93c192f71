"""One runner for every job on a results folder: lock, identity, ledger, executor, outputs.

``with JobFolder(prep) as job:`` takes the folder's lock, opens (or creates) its ledger and
refuses a folder trained under another config, clears temporaries left by a killed run and
starts the executor. ``job.train(tree)`` trains what is missing of a run tree; ``job.write``
puts an output in place atomically. Leaving the block closes the executor (aborting it on an
error), the ledger and the lock, and turns a folder that cannot be written into one SweepError
line. The sweep and the forecast are both jobs of this kind.
"""

from __future__ import annotations

import errno
import json
import sqlite3
import sys
import time
from typing import Any

from omegaconf import OmegaConf

from periodscan.config import TRAINING_KEYS
from periodscan.designs import STATE_KEY, Design
from periodscan.engine.checkpoint import remove_temporaries, write_atomic
from periodscan.engine.executors import make_executor
from periodscan.engine.lock import LOCK_NAME, FolderLock
from periodscan.engine.runner import CHECKPOINT_DIR, execute, plan_work
from periodscan.engine.tree import RunTree
from periodscan.errors import SweepError
from periodscan.jobs.fingerprint import changes
from periodscan.jobs.prepare import Prepared
from periodscan.ledger import FILE_NAME, Ledger

CONFIG_YAML = "config.yaml"


class JobFolder:
    """A results folder held by one job (see the module docstring)."""

    def __init__(self, prep: Prepared, *, command: str | None = None, quiet: bool = False,
                 write_config: bool = True):
        self.prep, self.command, self.quiet = prep, command, quiet
        self.write_config = write_config
        self.folder = prep.folder
        self.ledger: Ledger | None = None
        self.executor = None
        self.lock: FolderLock | None = None
        self.reused_runs = 0

    # --- lifetime -----------------------------------------------------------------------
    def __enter__(self) -> JobFolder:
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            self.lock = FolderLock(self.folder)
            self.lock.__enter__()
            self.ledger = open_ledger(self.prep)
            remove_temporaries(self.folder, self.folder / CHECKPOINT_DIR)
            self.executor = make_executor(self.prep.plain["executor"])
            self._write_start()
        except BaseException as err:
            self.__exit__(type(err), err, None)
            raise
        return self

    def __exit__(self, kind, err, trace) -> None:
        failed = err is not None
        try:
            if self.executor is not None:
                self.executor.close(abort=failed)
            if self.ledger is not None:
                self.ledger.close()
        finally:
            if self.lock is not None:
                self.lock.__exit__(kind, err, trace)
        if isinstance(err, (OSError, sqlite3.Error)):
            raise SweepError(storage_message(self.folder, err)) from None

    def _write_start(self) -> None:
        meta: dict[str, Any] = {"num_classes": self.prep.num_classes}
        if self.command:
            meta["command"] = self.command
        self.ledger.set_meta(**meta)
        config = self.folder / CONFIG_YAML
        if self.write_config or not config.exists():
            self.write(CONFIG_YAML, OmegaConf.to_yaml(OmegaConf.create(self.prep.plain)).encode())

    # --- work ---------------------------------------------------------------------------
    def train(self, tree: RunTree, monitor: dict[str, Any] | None = None) -> dict[str, int]:
        """Register the tree's runs and train every segment a finished run still needs."""
        self.ledger.register(tree.segments.values(), tree.runs.values(), tree.paths,
                             self.prep.identity)
        self._announce_reuse(tree)
        return execute(tree, self.ledger, self.folder, self.prep.training, self.executor,
                       self.prep.threads, quiet=self.quiet, monitor=monitor,
                       variants=self.prep.design.variant_blocks())

    def _announce_reuse(self, tree: RunTree) -> None:
        """Say when a rerun resumes: how many runs are already done, how much is left."""
        finished = self.ledger.finished_runs() & set(tree.runs)
        needed = plan_work(tree, self.ledger, self.folder).needed
        left = sum(tree.segments[s].epochs for s in needed)
        self.reused_runs = max(self.reused_runs, len(finished))
        if finished or left < tree.epochs_shared:  # said even when quiet: a log should keep it
            print(f"resuming: {len(finished)} of {len(tree.runs)} runs already finished in this "
                  f"folder; {left} of {tree.epochs_shared} epochs left to train",
                  file=sys.stderr, flush=True)

    def save_state(self, design: Design) -> None:
        """Store what a reader needs beyond the config to rebuild the design's table."""
        state = design.state()
        if state is not None:
            self.ledger.set_meta(**{STATE_KEY: state})

    def write(self, name: str, data: bytes) -> None:
        """Put one output file in place atomically (readers never see a partial file)."""
        write_atomic(self.folder / name, data)

    def close_executor(self) -> None:
        """Stop the workers once training is over (outputs need none)."""
        if self.executor is not None:
            self.executor.close()
            self.executor = None


def open_ledger(prep: Prepared) -> Ledger:
    """Open (or create) the ledger, refusing a folder written under a different training config."""
    if not (prep.folder / FILE_NAME).exists() and any(
            p.name != LOCK_NAME for p in prep.folder.iterdir()):
        raise SweepError(f"results folder {prep.folder} exists and is not a periodscan sweep; "
                         "choose another name=")
    try:
        ledger = Ledger(prep.folder)
        known = ledger.get_meta("identity")
    except sqlite3.DatabaseError as err:
        if "not a database" not in str(err) and "malformed" not in str(err):
            raise
        raise SweepError(f"the ledger {prep.folder / FILE_NAME} is damaged ({err}); move "
                         "it away to start this sweep over, or use a new name=...") from None
    if known is not None and known != prep.identity:
        before = json.loads(ledger.get_meta("training") or "{}")
        ledger.close()
        raise SweepError(f"results folder {prep.folder} holds a sweep trained under another "
                         f"config ({describe_changes(before, prep.covered)}); use a new "
                         "name=... or delete that folder")
    check_fingerprint(ledger, prep)
    if known is None:
        ledger.set_meta(identity=prep.identity, training=prep.covered, created=time.time())
    return ledger


def check_fingerprint(ledger: Ledger, prep: Prepared) -> None:
    """Refuse a folder trained on other data, code or versions; record it on first use."""
    recorded = ledger.get_meta("fingerprint")
    if recorded is None:
        ledger.set_meta(fingerprint=prep.fingerprint)
        return
    differences = changes(json.loads(recorded), prep.fingerprint)
    if differences:
        ledger.close()
        raise SweepError(f"results folder {prep.folder} holds a sweep trained on something "
                         f"else: {'; '.join(differences)}. Mixing them would average runs of "
                         "different experiments: use a new name=..., or delete that folder")


def describe_changes(before: dict[str, Any], after: dict[str, Any], limit: int = 3) -> str:
    """'schedule.epochs: 60 -> 30' for the first keys that differ between two configs."""
    changes = list(_differences(before, after, ""))
    if not changes:
        return "differs in: engine version or thread count"
    shown = "; ".join(changes[:limit])
    more = f"; and {len(changes) - limit} more" if len(changes) > limit else ""
    return f"differs in {shown}{more}"


def _differences(before: Any, after: Any, key: str):
    if isinstance(before, dict) and isinstance(after, dict):
        for name in sorted(set(before) | set(after), key=str):
            yield from _differences(before.get(name, "(unset)"), after.get(name, "(unset)"),
                                    f"{key}.{name}" if key else str(name))
    elif before != after:
        yield f"{key}: {before!r} -> {after!r}"


def storage_message(folder, err: OSError | sqlite3.Error) -> str:
    """One line for a results folder that cannot be written: what failed and what to do."""
    text = str(err).lower()
    if isinstance(err, OSError):
        what = f"{err.strerror or err}" + (f": {err.filename}" if err.filename else "")
        full = err.errno in (errno.ENOSPC, errno.EDQUOT)
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


__all__ = ["CONFIG_YAML", "TRAINING_KEYS", "JobFolder", "describe_changes", "open_ledger",
           "storage_message"]
