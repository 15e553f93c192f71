"""Everything periodscan shows: words, tables, figures and the report.

Analysis returns data (:mod:`periodscan.analysis`); these modules turn it into text, JSON,
PNGs and HTML. They take a design's :class:`~periodscan.designs.layout.Layout` and never ask
which design a sweep used.

* :mod:`~periodscan.views.words` - shared phrases: durations, times, titles, seed counts;
* :mod:`~periodscan.views.tables` - the sensitivity table as text;
* :mod:`~periodscan.views.plan` - the planner's answer as text and JSON;
* :mod:`~periodscan.views.progress` - a sweep's status as text and JSON;
* :mod:`~periodscan.views.dry_run` - the run tree and estimate of ``sweep --dry-run``;
* :mod:`~periodscan.views.forecast` - the Fisher forecast as text;
* :mod:`~periodscan.views.recovery` - words for a still-recovering gap and the established bound;
* :mod:`~periodscan.views.figures` - PNG figures (matplotlib);
* :mod:`~periodscan.views.markup`, :mod:`~periodscan.views.html_results`,
  :mod:`~periodscan.views.html` - the self-contained report page;
* :mod:`~periodscan.views.report` - writes the table files, figures and page of a sweep.
"""
