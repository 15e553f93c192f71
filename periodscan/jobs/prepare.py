"""Turn what a user passes (overrides, a dict, a composed config) into a validated job.

Everything that can be wrong with a config is found here, before any results folder is touched:
keys and values (:mod:`periodscan.params`), the design's block and windows
(:mod:`periodscan.designs`), and the components, built once with a trial batch
(:mod:`periodscan.components`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from omegaconf import DictConfig, OmegaConf

from periodscan.components import check_components
from periodscan.config import (
    TRAINING_KEYS,
    check_config,
    compose_config,
    results_folder,
    to_plain,
    training_identity,
)
from periodscan.designs import Design, load_design
from periodscan.designs.variants import variant_identity
from periodscan.engine.tree import RunTree, build_tree
from periodscan.jobs.fingerprint import fingerprint
from periodscan.jobs.variants import check_variants
from periodscan.params import seed_list


@dataclass(kw_only=True)
class Prepared:
    """A validated job: plain config, its design, first-round tree and where it writes."""

    plain: dict[str, Any]
    design: Design
    tree: RunTree  # the design's first round (all runs for one-round designs)
    folder: Path
    identity: str
    seeds: list[int]
    num_classes: int
    fingerprint: dict[str, Any]  # data, user code and versions (periodscan.jobs.fingerprint)

    @property
    def training(self) -> dict[str, Any]:
        """The config blocks that change the numbers (what a worker trains from)."""
        return {k: self.plain[k] for k in TRAINING_KEYS}

    @property
    def covered(self) -> dict[str, Any]:
        """What the identity covers, for messages: the training blocks, plus the deficit block
        of every variant when the design has variants."""
        variants = self.design.variant_blocks()
        return {**self.training, "variants": variants} if variants else self.training

    @property
    def threads(self) -> int:
        return int(self.plain["executor"].get("threads_per_worker") or 1)


def plain_config(config: DictConfig | dict | Sequence[str]) -> dict[str, Any]:
    """A composed config, a plain dict or Hydra override strings, as resolved plain dicts."""
    if isinstance(config, DictConfig):
        return to_plain(config)
    if isinstance(config, dict):
        return to_plain(OmegaConf.create(config))
    return to_plain(compose_config(list(config)))


def prepare(config: DictConfig | dict | Sequence[str]) -> Prepared:
    """Validate everything a job needs; raise a PeriodscanError naming the first problem."""
    plain = plain_config(config)
    check_config(plain)
    seeds = seed_list(plain)
    design = load_design(plain, seeds)
    runs = design.preview()
    data = check_components(plain)
    variants = design.variant_blocks()
    check_variants(plain, variants)
    identity = variant_identity(training_identity(plain), variants)
    return Prepared(plain=plain, design=design, tree=build_tree(runs, identity),
                    folder=results_folder(plain), identity=identity, seeds=seeds,
                    num_classes=int(data.num_classes),
                    fingerprint=fingerprint({**plain, "variants": variants}, data,
                                            (*TRAINING_KEYS, "monitor", "variants")))
