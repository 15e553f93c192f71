"""Jobs on a results folder: the sweep, its dry run and the Fisher forecast.

Each job validates its config first (:mod:`periodscan.jobs.prepare`), then holds the folder
through the one runner in :mod:`periodscan.jobs.folder`.
"""
