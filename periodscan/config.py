"""Compose the Hydra config, validate it once at the boundary, and expand the design into runs.

Hydra's compose API serves a CLI of several verbs; periodscan expands its own window lists
(compose refuses sweep syntax). Every check raises ConfigError naming the field, what is allowed
and what was given.
"""

from __future__ import annotations

import difflib
import functools
import hashlib
import json
import math
import os
import re
from collections.abc import Sequence
from importlib import resources
from pathlib import Path
from typing import Any

from hydra import compose, initialize_config_dir
from hydra.core.override_parser.overrides_parser import OverridesParser
from hydra.errors import HydraException, OverrideParseException
from omegaconf import DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from periodscan.engine.tree import RunSpec, baseline
from periodscan.errors import ConfigError, bad_value

#: Bump when a change to the engine changes the numbers a config produces.
ENGINE_VERSION = 1
GROUPS = ("data", "model", "deficit", "design", "schedule", "executor", "monitor", "experiment")
TRAINING_KEYS = ("data", "model", "deficit", "schedule")


def config_dir() -> str:
    """Folder of the config groups shipped with the package (the repo's configs/)."""
    return str(Path(str(resources.files("periodscan.configs"))).resolve())


def compose_config(overrides: Sequence[str] = (), extra_dir: str | None = None) -> DictConfig:
    """Compose ``config.yaml`` with Hydra override strings, e.g. ``["experiment=tiny", "seeds=2"]``.

    ``extra_dir`` is a folder of the user's own config groups, searched before the built-ins.
    """
    overrides = list(overrides)
    if extra_dir is not None:
        folder = Path(extra_dir).expanduser().resolve()
        if not folder.is_dir():
            raise ConfigError(f"--config-dir: folder '{folder}' does not exist")
        overrides.append(f"hydra.searchpath=[file://{folder}]")
    try:
        with initialize_config_dir(config_dir=config_dir(), version_base="1.3"):
            return compose(config_name="config", overrides=overrides)
    except (HydraException, OmegaConfBaseException) as err:
        unknown = _struct_key(err)
        if unknown is not None:
            raise ConfigError(_unknown_override(unknown, overrides)) from None
        if isinstance(err, OverrideParseException):
            raise ConfigError(_unparsable(overrides, err)) from None
        raise ConfigError(_one_line(err)) from None


def _unparsable(overrides: list[str], err: Exception) -> str:
    """Name the override Hydra's grammar cannot read, with the parser's complaint."""
    parser = OverridesParser.create()
    why = str(err).splitlines()[0] if str(err) else "syntax error"
    for override in overrides:
        try:
            parser.parse_overrides([override])
        except OverrideParseException:
            return (f"cannot read the override {override!r}: {why} (Hydra's override grammar: "
                    "key=value, key=[a,b], group=option)")
    return f"cannot read the overrides: {why}"


def _struct_key(err: Exception) -> str | None:
    """The full key of an override that names a key the config does not have, if that failed."""
    cause = err.__cause__
    if cause is not None and "not in struct" in str(cause):
        return getattr(cause, "full_key", None)
    return None


def _unknown_override(key: str, overrides: list[str]) -> str:
    """Say which key is unknown, which keys its parent has, and the closest one."""
    parent, _, leaf = key.rpartition(".")
    same = [o for o in overrides if o.split("=", 1)[0].lstrip("+~") != key]
    try:
        with initialize_config_dir(config_dir=config_dir(), version_base="1.3"):
            node = compose(config_name="config", overrides=same)
        for part in filter(None, parent.split(".")):
            node = node[part]
        known = sorted(str(k) for k in node.keys())
    except Exception:  # noqa: BLE001 - the message just lists no alternatives then
        known = []
    return _unknown_message(key, leaf, known)


def _unknown_message(key: str, leaf: str, known: list[str]) -> str:
    where = f"'{key.rpartition('.')[0]}'" if "." in key else "the top level of the config"
    close = difflib.get_close_matches(leaf, known, n=1)
    hint = f" Did you mean '{close[0]}'?" if close else ""
    return f"Unknown key '{key}': {where} has only {', '.join(known) or '(none)'}.{hint}"


def _one_line(err: Exception) -> str:
    """Turn Hydra's multi-line composition errors into one line that names the field."""
    text = str(err)
    missing = re.search(r"Could not find '([^/']+)/([^']+)'", text)
    if missing:
        group, option = missing.groups()
        options = available_options(group)
        return (f"The '{group}' option must be one of {', '.join(options)}. "
                f"Got {option!r} instead.")
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    return "; ".join(lines[:3])


def available_options(group: str) -> list[str]:
    """Option names of a config group (yaml file stems), for error messages and --help."""
    folder = Path(config_dir()) / group
    return sorted(p.stem for p in folder.glob("*.yaml"))


def to_plain(cfg: DictConfig) -> dict[str, Any]:
    """Resolved plain containers; a ``???`` left unset becomes a ConfigError naming the key."""
    try:
        return OmegaConf.to_container(cfg, resolve=True, throw_on_missing=True)
    except OmegaConfBaseException as err:
        key = getattr(err, "full_key", None) or "?"
        raise ConfigError(f"The '{key}' parameter is required but was not set "
                          f"(pass it as an override, e.g. {key}=...)") from None


def training_identity(plain: dict[str, Any]) -> str:
    """Hash of everything that changes the numbers; runs are only reused under the same hash."""
    keyed = {k: plain[k] for k in TRAINING_KEYS}
    keyed["threads"] = plain["executor"].get("threads_per_worker", 1)
    keyed["engine"] = ENGINE_VERSION
    return hashlib.sha256(json.dumps(keyed, sort_keys=True, default=str).encode()).hexdigest()[:16]


# --- validation ------------------------------------------------------------------------------

def _int(value: Any, field: str, low: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise bad_value(field, f"an int >= {low}", value)
    return value


def _number(value: Any, field: str, low: float, high: float | None = None,
            low_open: bool = False) -> float:
    ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    if ok:
        ok = (value > low if low_open else value >= low) and (high is None or value <= high)
    if not ok:
        bracket = "(" if low_open else "["
        upper = f"{high}]" if high is not None else "inf)"
        raise bad_value(field, f"a number in {bracket}{low}, {upper}", value)
    return float(value)


def seed_list(plain: dict[str, Any]) -> list[int]:
    """``seeds`` is a count (seeds 0..n-1) or an explicit list of distinct ints."""
    seeds = plain.get("seeds")
    if isinstance(seeds, int) and not isinstance(seeds, bool):
        return list(range(_int(seeds, "seeds", 1)))
    if isinstance(seeds, list) and seeds and all(isinstance(s, int) for s in seeds):
        if len(set(seeds)) != len(seeds):
            raise bad_value("seeds", "a list of distinct ints", seeds)
        return list(seeds)
    raise bad_value("seeds", "an int >= 1 or a non-empty list of ints", seeds)


def _span(first: int, last: int, step: int = 1) -> list[int]:
    """``${span:0,45,5}`` in a config or override: epochs first..last (included) every step."""
    if step < 1 or last < first:
        raise ConfigError(f"span: need first <= last and step >= 1; got span:{first},{last},{step}")
    return list(range(int(first), int(last) + 1, int(step)))


OmegaConf.register_new_resolver("span", _span, replace=True)


def expand_epochs(value: Any, field: str) -> list[int]:
    """A non-empty list of distinct epochs (``${span:a,b,step}`` resolves to one)."""
    if isinstance(value, list) and value:
        epochs = [_int(v, field) for v in value]
        if len(set(epochs)) != len(epochs):
            raise bad_value(field, "a list without repeated epochs", value)
        return sorted(epochs)
    raise bad_value(field, "a non-empty list of ints, or ${span:first,last,step}", value)


def validate_schedule(schedule: dict[str, Any]) -> None:
    _int(schedule.get("epochs"), "schedule.epochs", 1)
    _int(schedule.get("batch_size"), "schedule.batch_size", 1)
    opt = schedule.get("optimizer") or {}
    if opt.get("name") not in ("sgd", "adam"):
        raise bad_value("schedule.optimizer.name", "one of 'sgd', 'adam'", opt.get("name"))
    _number(opt.get("lr"), "schedule.optimizer.lr", 0.0, low_open=True)
    _number(opt.get("momentum", 0.0), "schedule.optimizer.momentum", 0.0, 1.0)
    _number(opt.get("weight_decay", 0.0), "schedule.optimizer.weight_decay", 0.0)
    lrs = schedule.get("lr_schedule") or {}
    kind = lrs.get("kind")
    if kind not in ("constant", "step", "exponential", "cosine"):
        raise bad_value("schedule.lr_schedule.kind",
                        "one of 'constant', 'step', 'exponential', 'cosine'", kind)
    if kind in ("step", "exponential"):
        _number(lrs.get("gamma"), "schedule.lr_schedule.gamma", 0.0, 1.0, low_open=True)
    if kind == "step":
        _int(lrs.get("step_size"), "schedule.lr_schedule.step_size", 1)
    _int(lrs.get("warmup_epochs", 0) or 0, "schedule.lr_schedule.warmup_epochs")
    augment = schedule.get("augment") or {}
    _int(augment.get("max_shift", 0), "schedule.augment.max_shift")


#: Groups read only by periodscan itself: every key must be one a shipped option of the group
#: has. (data, model, deficit and monitor are ``_target_`` calls: a wrong keyword is refused
#: when they are built.)
CHECKED_GROUPS = ("schedule", "design", "executor")


def _key_tree(into: dict[str, Any], node: Any) -> None:
    """Merge the nested key structure of ``node`` into ``into`` (leaves become None)."""
    for key, value in node.items():
        if isinstance(value, dict):
            sub = into.get(key)
            if not isinstance(sub, dict):
                sub = into[key] = {}
            _key_tree(sub, value)
        else:
            into.setdefault(key, None)


@functools.lru_cache(maxsize=1)
def known_keys() -> dict[str, Any]:
    """Keys the shipped configs define: the root's, and each checked group's (union of options)."""
    root = OmegaConf.to_container(OmegaConf.load(Path(config_dir()) / "config.yaml"))
    tree: dict[str, Any] = {k: None for k in root if k != "defaults"}
    tree.update({g: None for g in GROUPS if g != "experiment"})
    for group in CHECKED_GROUPS:
        tree[group] = {}
        for path in sorted((Path(config_dir()) / group).glob("*.yaml")):
            option = OmegaConf.to_container(OmegaConf.load(path))
            _key_tree(tree[group], option or {})
    return tree


def check_known_keys(plain: dict[str, Any]) -> None:
    """Refuse keys no periodscan code reads (a misspelling in a preset or a ``+key=`` override)."""
    def walk(node: dict[str, Any], known: dict[str, Any], prefix: str) -> None:
        for key, value in node.items():
            full = f"{prefix}{key}"
            if key not in known:
                raise ConfigError(_unknown_message(full, str(key), sorted(known)))
            if isinstance(value, dict) and isinstance(known[key], dict):
                walk(value, known[key], f"{full}.")

    walk(plain, known_keys(), "")


def validate_run_settings(plain: dict[str, Any]) -> None:
    """Root settings that shape the analysis: confidence level and tolerance (points)."""
    confidence = plain.get("confidence", 0.95)
    if (isinstance(confidence, bool) or not isinstance(confidence, (int, float))
            or not 0.0 < confidence < 1.0):
        raise bad_value("confidence", "a number in the open interval (0, 1)", confidence)
    tolerance = plain.get("tolerance")
    if tolerance is not None and (
            isinstance(tolerance, bool) or not isinstance(tolerance, (int, float))
            or not math.isfinite(tolerance) or tolerance < 0):
        raise bad_value("tolerance", "null or a finite number >= 0 (accuracy points)", tolerance)


def validate_executor(executor: dict[str, Any]) -> None:
    kinds = ("serial", "local", "dask")
    if executor.get("kind") not in kinds:
        raise bad_value("executor.kind", f"one of {', '.join(map(repr, kinds))}",
                        executor.get("kind"))
    if executor.get("workers") is not None:
        _int(executor["workers"], "executor.workers", 1)
    _int(executor.get("threads_per_worker", 1), "executor.threads_per_worker", 1)
    address = executor.get("address")
    if address is not None and (not isinstance(address, str) or ":" not in address):
        raise bad_value("executor.address", "null or a Dask scheduler address such as "
                        "'tcp://host:8786' or 'host:8786'", address)


def plan_runs(plain: dict[str, Any]) -> list[RunSpec]:
    """Validate the design against the schedule and list every run (baselines included)."""
    check_known_keys(plain)
    validate_run_settings(plain)
    validate_schedule(plain["schedule"])
    validate_executor(plain["executor"])
    seeds = seed_list(plain)
    epochs = plain["schedule"]["epochs"]
    design = plain["design"]
    kind = design.get("kind")
    if kind == "window":
        starts = expand_epochs(design.get("starts"), "design.starts")
        lengths = expand_epochs(design.get("lengths"), "design.lengths")
        if 0 in lengths:
            raise bad_value("design.lengths", "ints >= 1", design.get("lengths"))
        windows = [(s, n) for s in starts for n in lengths]
    elif kind == "removal":
        until = expand_epochs(design.get("until"), "design.until")
        if 0 in until:
            raise bad_value("design.until", "ints >= 1", design.get("until"))
        windows = [(0, t) for t in until]
    else:
        raise bad_value("design.kind", "one of 'window', 'removal', 'adaptive' (adaptive runs "
                        "through periodscan.adaptive.run_adaptive)", kind)

    budget = design.get("budget")
    if budget == "fixed_total":
        for start, length in windows:
            if start + length > epochs:
                field = "design.until" if kind == "removal" else "design.starts"
                latest = epochs - length
                allowed = (f"windows that end by the last epoch ({epochs}); for length {length} "
                           f"the latest start is {latest}" if latest >= 0 else
                           f"lengths up to schedule.epochs ({epochs})")
                raise ConfigError(f"The '{field}' parameter must give {allowed}. Got window "
                                  f"[{start}, {start + length}) instead.")
        ends = {w: epochs for w in windows}
    elif budget == "fixed_recovery":
        recovery = _int(design.get("recovery_epochs"), "design.recovery_epochs", 1)
        ends = {(s, n): s + n + recovery for s, n in windows}
    else:
        raise bad_value("design.budget", "one of 'fixed_total', 'fixed_recovery'", budget)

    runs = []
    for seed in seeds:
        runs += [RunSpec(seed, s, n, ends[(s, n)]) for s, n in windows]
        runs += [baseline(seed, end) for end in sorted(set(ends.values()))]
    return runs


def results_folder(plain: dict[str, Any]) -> Path:
    name = plain.get("name")
    if not isinstance(name, str) or not re.fullmatch(r"[A-Za-z0-9_.\-]+", name or ""):
        raise bad_value("name", "a folder name of letters, digits, '.', '_' or '-'", name)
    return Path(os.path.expanduser(str(plain.get("results_dir", "results")))) / name
