"""Audits of scores exported from a deployed detector: file -> flags -> metrics.

``spec`` holds the settings (configs/audit/*.yaml), ``table`` reads and checks
the file, ``compute`` evaluates the metric suites overall and per period and
tests the change between the first and last period. Tracking and the memo
live in ``runner.audit_job`` and ``report``, as for benchmark runs.
"""
