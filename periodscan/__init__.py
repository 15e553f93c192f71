"""periodscan: find the epochs in which a temporary data deficit does lasting damage."""

from periodscan.errors import ConfigError, DataError, PeriodscanError, SweepError

__version__ = "0.1.0"

__all__ = ["ConfigError", "DataError", "PeriodscanError", "SweepError", "load_sweep", "run_sweep",
           "__version__"]


def run_sweep(config=(), quiet: bool = False):
    """Run or resume a sweep from overrides, a dict or a composed config (jobs/sweep.py)."""
    from periodscan.jobs.sweep import run_sweep as _run

    return _run(config, quiet=quiet)


def load_sweep(sweep, results_dir="results"):
    """Open a sweep folder (or a name under ``results_dir``) for reading (see api.py)."""
    from periodscan.api import load_sweep as _load

    return _load(sweep, results_dir)
