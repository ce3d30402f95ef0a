"""The statistics of the audit: intervals, tests, multiplicity, monitoring, calibration,
weighting and drift, as pure functions over counts (no database, HTTP or files).

Each module is checked in the tests against a general-purpose reference implementation or a
published worked example.
"""
