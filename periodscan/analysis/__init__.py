"""Statistics of a sweep: paired damage, intervals, per-example tests, verdicts and answers.

Every module returns data (dataclasses, DataFrames, codes); :mod:`periodscan.views` turns it
into words and figures.

* :mod:`~periodscan.analysis.stats` - t and bootstrap intervals, the t test against the
  tolerance, Holm's adjustment, seeds needed to settle a window;
* :mod:`~periodscan.analysis.mcnemar` - McNemar's test of a window run against its baseline;
* :mod:`~periodscan.analysis.chance` - whether a run's final accuracy is at chance level;
* :mod:`~periodscan.analysis.verdicts` - critical / safe / undetermined labels with Holm;
* :mod:`~periodscan.analysis.sensitivity` - the sensitivity table that ties them together;
* :mod:`~periodscan.analysis.recovery` - whether each window's gap is still closing at the end;
* :mod:`~periodscan.analysis.established` - the Holm upper bound on damage over all windows;
* :mod:`~periodscan.analysis.planner` - where may a deficit of L epochs go (the ``plan`` answer);
* :mod:`~periodscan.analysis.progress` - how far a sweep has come, read from its ledger;
* :mod:`~periodscan.analysis.readings` - monitor readings (the Fisher trace) as curves.
"""
