"""Deficit variants: several strengths of one deficit, or several deficits, in one sweep.

A window or removal design may train each of its windows with more than one deficit. Every
variant branches from the same clean trunk of a seed (its runs carry the variant's key, see
:class:`periodscan.engine.tree.RunSpec`), so adding a variant costs only its own branches:

* ``design.severity: {param: sigma, levels: [1, 2, 4]}`` - the config's deficit at each level of
  one of its parameters, listed from the mildest to the most severe (for a crop that is
  ``keep: [0.9, 0.7, 0.5]``: the order of the list, not the size of the number, is the order of
  severity). The variant key is ``param=level`` (``sigma=2``).
* ``design.deficits: [blur, label_noise, crop]`` - names of ``configs/deficit/`` options, or
  deficit blocks with a ``_target_`` (a deficit of your own); the key is the option name, or
  the target's class name with its parameters for a block.

Not a kind of design: this module is the part of the window and removal designs that reads
these two fields, and what a reader needs to show them (labels, levels).
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from pathlib import Path
from typing import Any

from omegaconf import OmegaConf

from periodscan.params import Interval, ListOf, Pattern, bad_value, check_value

#: What the sweep varies: nothing, the strength of the config's deficit, or which deficit.
NONE, SEVERITY, DEFICITS = "", "severity", "deficits"


@dataclass(frozen=True)
class Variant:
    """One deficit a design's windows are trained with.

    ``key`` names it in run ids and segment ids; ``label`` is how views show it; ``deficit`` is
    the block the worker instantiates; ``param`` and ``value`` are the severity parameter and
    level (None for a sweep of several deficits); ``rank`` is its place in the listing
    (0 = mildest level).
    """

    key: str
    label: str
    deficit: dict[str, Any]
    param: str | None = None
    value: Any = None
    rank: int = 0

    def record(self) -> dict[str, Any]:
        """As plain JSON-able data (what the ledger keeps for readers)."""
        return asdict(self)


@dataclass(frozen=True)
class Block:
    """A mapping whose keys are among ``keys`` (its values are checked one by one after)."""

    keys: tuple[str, ...]
    words: str

    def holds(self, value: Any) -> bool:
        return isinstance(value, Mapping) and set(value) <= set(self.keys)

    def __str__(self) -> str:
        return self.words


@dataclass(frozen=True)
class DeficitItem:
    """A deficit option name, or a deficit block with a ``_target_``."""

    def holds(self, value: Any) -> bool:
        if isinstance(value, str):
            return value in deficit_options()
        return isinstance(value, Mapping) and isinstance(value.get("_target_"), str)

    def __str__(self) -> str:
        return "a deficit option name or a deficit block with a _target_"


@dataclass(frozen=True)
class Level:
    """One severity level: a finite number or a string."""

    def holds(self, value: Any) -> bool:
        return isinstance(value, str) or Interval(float, None, None).holds(value)

    def __str__(self) -> str:
        return "a number or a string"


SEVERITY_BLOCK = Block(("param", "levels"), "{param: <a parameter of the deficit>, "
                                            "levels: [<mildest>, ..., <most severe>]}")


@dataclass(frozen=True)
class DeficitList(ListOf):
    """A non-empty list of deficits; its message lists the shipped option names."""

    def __str__(self) -> str:
        return ("a non-empty list of deficit option names (" + ", ".join(deficit_options())
                + ") or deficit blocks with a _target_")


DEFICIT_LIST = DeficitList(DeficitItem())
PARAM = Pattern(r"[A-Za-z_]\w*", "the name of a parameter of the deficit")
LEVELS = ListOf(Level(), distinct=True,
                words="a non-empty list of distinct levels (numbers or strings), mildest first")
#: The design fields this module reads (merged into a design's constraint table).
FIELDS = {"severity": [SEVERITY_BLOCK, None], "deficits": [DEFICIT_LIST, None]}


def deficit_options() -> list[str]:
    """Names of the shipped deficit options (``configs/deficit/*.yaml``)."""
    from periodscan.config import available_options

    return available_options("deficit")


def option_block(name: str) -> dict[str, Any]:
    """The deficit block of a shipped option, as ``deficit=<name>`` would compose it."""
    from periodscan.config import config_dir

    path = Path(config_dir()) / "deficit" / f"{name}.yaml"
    return OmegaConf.to_container(OmegaConf.load(path), resolve=True)


def level_text(value: Any) -> str:
    """A level as it appears in keys and labels: 2.0 -> '2', 0.25 -> '0.25'."""
    if isinstance(value, (int, float)):
        return f"{value:.12g}"
    return str(value)


def block_label(block: Mapping[str, Any]) -> str:
    """'Blur(sigma=4)' for a deficit block given inline."""
    name = str(block["_target_"]).rsplit(".", 1)[-1]
    params = ",".join(f"{k}={level_text(v)}" for k, v in block.items() if k != "_target_")
    return f"{name}({params})" if params else name


def severity_variants(spec: Mapping[str, Any], deficit: Mapping[str, Any]) -> list[Variant]:
    """The config's deficit at each level of ``spec['param']``, mildest first."""
    param = check_value("design.severity.param", spec.get("param"), [PARAM])
    known = [k for k in deficit if k != "_target_"]
    if param not in known:
        raise bad_value("design.severity.param",
                        f"a parameter of the deficit ({', '.join(map(repr, known)) or 'none'}; "
                        "add another with +deficit.<name>=...)", param)
    levels = check_value("design.severity.levels", spec.get("levels"), [LEVELS])
    return [Variant(key=f"{param}={level_text(v)}", label=f"{param} {level_text(v)}",
                    deficit={**deficit, param: v}, param=param, value=v, rank=i)
            for i, v in enumerate(levels)]


def listed_variants(items: list[Any]) -> list[Variant]:
    """One variant per listed deficit, in the order given."""
    out = []
    for i, item in enumerate(items):
        if isinstance(item, str):
            out.append(Variant(key=item, label=item, deficit=option_block(item), rank=i))
        else:
            label = block_label(item)
            out.append(Variant(key=label, label=label, deficit=dict(item), rank=i))
    keys = [v.key for v in out]
    if len(set(keys)) != len(keys):
        raise bad_value("design.deficits", "a list of distinct deficits", items)
    return out


def what_varies(block: Mapping[str, Any]) -> str:
    """NONE, SEVERITY or DEFICITS for a design block (both set is refused)."""
    severity, deficits = block.get("severity"), block.get("deficits")
    if severity is not None and deficits is not None:
        raise bad_value("design.deficits", "null when design.severity is set (a sweep varies "
                        "either the strength of its deficit or which deficit)", deficits)
    return SEVERITY if severity is not None else DEFICITS if deficits is not None else NONE


def design_variants(block: Mapping[str, Any], deficit: Mapping[str, Any],
                    stored: list[dict[str, Any]] | None = None) -> list[Variant]:
    """The variants of a design block ([] when it varies nothing).

    ``stored`` (records kept in the ledger) wins over the block: a reader shows what was
    trained even if a shipped deficit option changed since.
    """
    varies = what_varies(block)
    if stored:
        return [Variant(**record) for record in stored]
    if varies == SEVERITY:
        return severity_variants(block["severity"], deficit)
    if varies == DEFICITS:
        return listed_variants(block["deficits"])
    return []


def refuse_variants(block: Mapping[str, Any], kind: str) -> None:
    """A design that trains one deficit only: say so if the block asks for variants."""
    for name in FIELDS:
        if block.get(name) is not None:
            raise bad_value(f"design.{name}", f"null: design {kind!r} trains the config's "
                            "deficit only (design=window or design=removal take variants)",
                            block[name])


def variant_state(variants: list[Variant]) -> dict[str, Any] | None:
    """What the ledger keeps so readers can show the variants (None without variants)."""
    return {"variants": [v.record() for v in variants]} if variants else None


def stored_variants(state: Any) -> list[dict[str, Any]] | None:
    """The variant records in a design's stored state, if any."""
    return state.get("variants") if isinstance(state, Mapping) else None


def axis_title(variants: list[Variant], deficit: Mapping[str, Any]) -> str:
    """What the variants vary, for views: 'deficit', or 'Blur sigma' for a severity sweep."""
    if not variants:
        return ""
    if variants[0].param is None:
        return "deficit"
    name = str(deficit.get("_target_") or variants[0].deficit.get("_target_") or "")
    return f"{name.rsplit('.', 1)[-1]} {variants[0].param}".strip()


def variants_summary(variants: list[Variant]) -> str:
    """'; severity sigma 1, 2, 4' or '; deficits blur, crop' for a design's one-line summary."""
    if not variants:
        return ""
    if variants[0].param is not None:
        levels = ", ".join(level_text(v.value) for v in variants)
        return f"; severity {variants[0].param} {levels} (mildest first)"
    return "; deficits " + ", ".join(v.label for v in variants)


def variant_identity(identity: str, blocks: Mapping[str, Mapping[str, Any]]) -> str:
    """A sweep's training identity covering its variants' deficit blocks too.

    Unchanged without variants (so folders of sweeps without them keep their identity);
    otherwise a hash of the identity and every variant's key and block.
    """
    if not blocks:
        return identity
    text = json.dumps({"identity": identity, "variants": blocks}, sort_keys=True, default=str)
    return hashlib.sha256(text.encode()).hexdigest()[:16]
