"""Monitors as a plugin kind: every shipped option builds a Monitor, the engine honours ``every``
and ``on_windows`` read from the monitor, and a target that is not a Monitor is refused.
"""

from __future__ import annotations

import pickle
from pathlib import Path

import pytest
from omegaconf import OmegaConf

from periodscan.engine.records import SegmentJob
from periodscan.engine.runner import monitored
from periodscan.engine.segment import run_segment
from periodscan.engine.tree import RunSpec, build_tree
from periodscan.errors import ConfigError
from periodscan.monitors import (
    TOTAL,
    FisherMonitor,
    Monitor,
    build_monitor,
    check_monitor,
    monitor_every,
)


class EpochCounter(Monitor):
    """A user monitor: records the epoch it was called after and the training set's size."""

    def __init__(self, every: int = 1, on_windows: bool = False, scale: float = 1.0):
        super().__init__(every=every, on_windows=on_windows)
        self.scale = scale

    def __call__(self, model, data, seed, epoch):
        return {"count/epoch": self.scale * epoch, "count/n_train": len(data.y_train)}


class EveryZero(Monitor):
    def __init__(self):  # skips Monitor.__init__, so nothing has checked ``every`` yet
        self.every = 0

    def __call__(self, model, data, seed, epoch):
        return {}


def not_a_monitor(every: int = 1):
    return {"every": every}


HERE = __name__  # the module name tests import this file as (tests/ is on sys.path)
MONITOR_CONFIGS = Path(__file__).resolve().parents[1] / "configs" / "monitor"
OPTIONS = sorted(p.stem for p in MONITOR_CONFIGS.glob("*.yaml"))
TRAINING = ("data", "model", "deficit", "schedule")  # what a segment job's config holds


@pytest.mark.parametrize("option", OPTIONS)
def test_every_monitor_option_builds_a_monitor(option):
    settings = OmegaConf.to_container(
        OmegaConf.load(MONITOR_CONFIGS / f"{option}.yaml"), resolve=True)
    monitor = build_monitor(settings)
    if option == "none":
        assert monitor is None
        return
    assert isinstance(monitor, Monitor)
    assert settings["_target_"].startswith("periodscan.monitors.")
    assert (monitor.every, monitor.on_windows) == (settings["every"], settings["on_windows"])
    again = pickle.loads(pickle.dumps(monitor))  # jobs may carry one to another process
    assert type(again) is type(monitor) and vars(again).keys() == vars(monitor).keys()


def test_fisher_target_is_the_monitors_package():
    monitor = build_monitor({"_target_": "periodscan.monitors.FisherMonitor", "every": 2})
    assert isinstance(monitor, FisherMonitor) and monitor.every == 2


@pytest.mark.parametrize("target, match", [
    ("collections.OrderedDict", r"'monitor\._target_' parameter must name a subclass of "
                                r"periodscan\.monitors\.Monitor.*Got 'collections\.OrderedDict'"
                                r" instead, which builds collections\.OrderedDict"),
    (f"{HERE}.not_a_monitor", r"monitor\._target_.*builds builtins\.dict"),
    ("no_such_package.Probe", r"monitor\._target_.*cannot be imported "
                              r"\(No module named 'no_such_package'\)"),
])
def test_a_target_that_builds_no_monitor_is_refused(target, match):
    with pytest.raises(ConfigError, match=match):
        check_monitor({"_target_": target})


def test_own_errors_and_schedule_are_checked():
    with pytest.raises(ConfigError, match=r"'monitor\.every' parameter must be an int >= 1"):
        build_monitor({"_target_": f"{HERE}.EveryZero"})
    with pytest.raises(ConfigError, match=r"monitor\.probe_size"):  # through hydra's wrapper
        build_monitor({"_target_": "periodscan.monitors.FisherMonitor", "probe_size": 0})
    with pytest.raises(ConfigError, match=r"monitor\.on_windows"):
        build_monitor({"_target_": f"{HERE}.EpochCounter", "on_windows": "yes"})
    assert build_monitor(None) is None and build_monitor({}) is None


def test_monitor_every_reads_the_built_monitor():
    assert monitor_every({"_target_": "periodscan.monitors.FisherMonitor", "every": 4}) == 4
    assert monitor_every({"_target_": f"{HERE}.EpochCounter"}) == 1  # the base class default
    assert monitor_every({}) == 1
    assert TOTAL == "fisher/total"


def test_base_class_needs_a_call():
    with pytest.raises(NotImplementedError, match="must define __call__"):
        Monitor()(None, None, 0, 0)


@pytest.mark.parametrize("every, expected", [(1, [0, 1, 2, 3, 4]), (2, [0, 2, 4]), (3, [0, 3])])
def test_segment_probes_the_epochs_every_selects(make_config, every, expected):
    config = make_config(seeds=1)
    job = SegmentJob(segment_id="s", config={k: config[k] for k in TRAINING}, seed=0, begin=0,
                     end=5, deficit_on=False, parent_checkpoint=None, keep_checkpoint=False,
                     evaluate_at_end=False,
                     monitor={"_target_": f"{HERE}.EpochCounter", "every": every, "scale": 2.0})
    result = run_segment(job)
    assert result.error is None, result.error
    assert [(e, v) for e, name, v in result.extras if name == "count/epoch"] == [
        (e, 2.0 * e) for e in expected]
    assert {v for _, name, v in result.extras if name == "count/n_train"} == {600.0}


def test_runner_reads_on_windows_from_the_monitor():
    tree = build_tree([RunSpec(seed=0, start=0, length=0, end=4),
                       RunSpec(seed=0, start=1, length=1, end=4)], identity="m")
    clean = {sid for sid, s in tree.segments.items()
             if not any(tree.segments[a].deficit_on for a in tree.ancestors(sid))}
    assert clean and clean != set(tree.segments)
    trunk_only = EpochCounter(on_windows=False)
    everywhere = EpochCounter(on_windows=True)
    assert {sid for sid in tree.segments if monitored(tree, sid, trunk_only)} == clean
    assert all(monitored(tree, sid, everywhere) for sid in tree.segments)
    assert not any(monitored(tree, sid, None) for sid in tree.segments)
