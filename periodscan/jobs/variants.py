"""Check a design's deficit variants before any folder is touched, as components are checked.

Every variant's deficit block is built and run on a trial batch of the data the same way the
config's own deficit is (:func:`periodscan.components.check_components`), so a bad level (a
negative blur sigma) or an unknown ``_target_`` stops the sweep with one line that names the
variant.
"""

from __future__ import annotations

from typing import Any

from periodscan.components import check_components
from periodscan.errors import ConfigError, PeriodscanError


def check_variants(plain: dict[str, Any], blocks: dict[str, dict[str, Any]]) -> None:
    """Build and try the deficit of every variant; raise ConfigError naming the first bad one."""
    for key, block in blocks.items():
        try:
            check_components({**plain, "deficit": block})
        except PeriodscanError as err:
            raise ConfigError(f"design variant {key!r} (its deficit block {block}): {err}"
                              ) from None
