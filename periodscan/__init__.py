"""periodscan: find the epochs in which a temporary data deficit does lasting damage."""

from periodscan.errors import ConfigError, DataError, PeriodscanError, SweepError

__version__ = "0.1.0"

__all__ = ["ConfigError", "DataError", "PeriodscanError", "SweepError", "run_sweep", "__version__"]


def run_sweep(config=(), quiet: bool = False):
    """Run or resume a sweep from override strings, a dict or a composed config (see sweep.py)."""
    from periodscan.sweep import run_sweep as _run

    return _run(config, quiet=quiet)
