"""Statistics of a sweep: paired damage, intervals, per-example tests and verdicts.

* :mod:`~periodscan.analysis.stats` - t and bootstrap intervals, the t test against the
  tolerance, Holm's adjustment, seeds needed to settle a window;
* :mod:`~periodscan.analysis.mcnemar` - McNemar's test of a window run against its baseline;
* :mod:`~periodscan.analysis.verdicts` - critical / safe / undetermined labels with Holm;
* :mod:`~periodscan.analysis.sensitivity` - the sensitivity table that ties them together.
"""
