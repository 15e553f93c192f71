"""Designs: which windows a sweep runs. One module per ``design.kind``, each exporting DESIGN.

``load_design(plain, seeds)`` is the only place that reads ``design.kind``; adding a design is a
module here (named like its kind) plus a config file in ``configs/design/``.
"""

from __future__ import annotations

import importlib
import pkgutil
from typing import Any

from periodscan.designs.base import STATE_KEY, Design
from periodscan.designs.layout import Layout
from periodscan.params import Options, check_value

__all__ = ["STATE_KEY", "Design", "Layout", "design_kinds", "load_design"]


def design_kinds() -> tuple[str, ...]:
    """Kinds implemented in this package (modules that export DESIGN)."""
    kinds = []
    for info in pkgutil.iter_modules(__path__):
        module = importlib.import_module(f"{__name__}.{info.name}")
        if isinstance(getattr(module, "DESIGN", None), type):
            kinds.append(info.name)
    return tuple(sorted(kinds))


def design_class(kind: Any) -> type[Design]:
    check_value("design.kind", kind, [Options(source=design_kinds)])
    return importlib.import_module(f"{__name__}.{kind}").DESIGN


def load_design(plain: dict[str, Any], seeds: list[int],
                meta: dict[str, Any] | None = None) -> Design:
    """The design of a plain config; ``meta`` (a ledger's meta values) restores its state."""
    cls = design_class((plain.get("design") or {}).get("kind"))
    state = cls.state_from_meta(meta) if meta else None
    return cls(plain, seeds, state)
