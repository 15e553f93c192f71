"""One run trained from scratch as a Hydra app: the "usual way" side of benchmarks/speed.py.

A team without periodscan would write a training script and launch a Hydra multirun over the
window start with the joblib launcher. This script is that: it composes periodscan's own configs
(so the runs are the very same runs), picks run number ``+bench.index`` of the design, trains it
from scratch with the same training loop, and writes its final metrics as JSON.

    python benchmarks/hydra_one_run.py -m '+bench.index=range(0,12)' hydra/launcher=joblib \
        hydra.launcher.n_jobs=2 +bench.out=/tmp/hydra_runs [periodscan overrides...]
"""

from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

import hydra
import torch
from omegaconf import DictConfig, OmegaConf

from periodscan.config import TRAINING_KEYS
from periodscan.designs import load_design
from periodscan.engine.segment import load_data, train_from_scratch
from periodscan.engine.training import evaluate
from periodscan.params import seed_list


def plan_runs(plain: dict) -> list:
    """The runs of a config's design (its first round), as a sweep would train them."""
    return load_design(plain, seed_list(plain)).preview()


@hydra.main(config_path="pkg://periodscan.configs", config_name="config", version_base="1.3")
def main(cfg: DictConfig) -> None:
    bench = cfg.bench
    plain = OmegaConf.to_container(cfg, resolve=True)
    plain.pop("bench")
    plain.pop("hydra", None)
    runs = sorted(plan_runs(plain), key=lambda r: (r.seed, r.start, r.length, r.end))
    run = runs[int(bench.index)]
    threads = int(plain["executor"].get("threads_per_worker", 1))
    training = {k: plain[k] for k in TRAINING_KEYS}
    model, _, records = train_from_scratch(training, run, threads=threads)
    data = load_data(training["data"])
    final = evaluate(model, data.x_test, data.y_test)
    out = Path(bench.out)
    out.mkdir(parents=True, exist_ok=True)
    record = {
        "run_id": run.run_id,
        "test_acc": final.acc,
        "epochs": run.end,
        "correct_sha1": hashlib.sha1(final.correct.numpy().tobytes()).hexdigest(),
        "pid": os.getpid(),
        "threads": torch.get_num_threads(),
    }
    (out / f"{run.run_id}.json").write_text(json.dumps(record))


if __name__ == "__main__":
    main()
