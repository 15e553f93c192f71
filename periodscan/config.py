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
from omegaconf.errors import MissingMandatoryValue, OmegaConfBaseException

from periodscan.errors import ConfigError
from periodscan.params import ROOT, check_settings, check_value

#: Bump when a change to the engine changes the numbers a config produces.
ENGINE_VERSION = 1
GROUPS = ("data", "model", "deficit", "design", "schedule", "step", "executor", "monitor",
          "experiment")
TRAINING_KEYS = ("data", "model", "deficit", "schedule", "step", "device")
#: Training keys added after identities were first recorded, at the value that trains exactly
#: as before they existed (configs/step/cross_entropy.yaml, the CPU). At that value they stay
#: out of the identity hash, so a folder made before them keeps its identity.
LATER_TRAINING_DEFAULTS = {
    "step": {"_target_": "periodscan.steps.CrossEntropy", "label_smoothing": 0.0,
             "max_grad_norm": None},
    "device": "cpu",
}


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
    """Resolved plain containers; a ``???`` left unset or an unreadable ``${...}`` names its key."""
    try:
        return OmegaConf.to_container(cfg, resolve=True, throw_on_missing=True)
    except MissingMandatoryValue as err:
        key = getattr(err, "full_key", None) or "?"
        raise ConfigError(f"The '{key}' parameter is required but was not set "
                          f"(pass it as an override, e.g. {key}=...)") from None
    except OmegaConfBaseException as err:
        key = getattr(err, "full_key", None) or "?"
        why = (str(err).splitlines() or ["cannot be resolved"])[0]
        why = re.sub(r"^\w+ raised while resolving interpolation: ", "", why)
        raise ConfigError(f"The '{key}' parameter cannot be read: {why}") from None


def training_identity(plain: dict[str, Any]) -> str:
    """Hash of everything that changes the numbers; runs are only reused under the same hash."""
    keyed = {k: plain[k] for k in TRAINING_KEYS if not _as_before(plain, k)}
    keyed["threads"] = plain["executor"].get("threads_per_worker", 1)
    keyed["engine"] = ENGINE_VERSION
    return hashlib.sha256(json.dumps(keyed, sort_keys=True, default=str).encode()).hexdigest()[:16]


def _as_before(plain: dict[str, Any], key: str) -> bool:
    """True for a later training key that is absent or at its value that trains as before."""
    if key not in LATER_TRAINING_DEFAULTS:
        return False
    return plain.get(key, LATER_TRAINING_DEFAULTS[key]) == LATER_TRAINING_DEFAULTS[key]


# --- values ---------------------------------------------------------------------------------

def _span(*args: Any) -> list[int]:
    """``${span:0,45,5}`` in a config or override: epochs first..last (included) every step."""
    text = ",".join(map(str, args))
    ints = [a for a in args if isinstance(a, int) and not isinstance(a, bool)]
    if len(args) not in (2, 3) or len(ints) != len(args):
        raise ConfigError(f"${{span:{text}}} cannot be read: span takes two or three ints, "
                          "first,last[,step], e.g. ${span:0,40,10}")
    first, last, step = (*ints, 1)[:3]
    if step < 1 or last < first or first < 0:
        raise ConfigError(f"${{span:{text}}} cannot be read: it needs 0 <= first <= last and "
                          "step >= 1, e.g. ${span:0,40,10}")
    return list(range(first, last + 1, step))


OmegaConf.register_new_resolver("span", _span, replace=True)


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
            if isinstance(value, dict) and isinstance(known[key], dict) and (
                    "_target_" not in value):  # a _target_'s keywords are checked when built
                walk(value, known[key], f"{full}.")

    walk(plain, known_keys(), "")


def check_config(plain: dict[str, Any]) -> None:
    """Keys and values of everything periodscan reads itself (designs check their own block)."""
    check_known_keys(plain)
    check_settings(plain)


def results_folder(plain: dict[str, Any]) -> Path:
    """``<results_dir>/<name>``: where a sweep writes."""
    name = check_value("name", plain.get("name"), ROOT["name"])
    return Path(os.path.expanduser(str(plain.get("results_dir", "results")))) / name
