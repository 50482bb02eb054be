"""Pure numerical engines: numpy/scipy only, no files, clock, printing, pandas or pydantic.

Importing any engine module runs this first, so the registry of statistics always holds the test
statistics too: ``teststats`` registers them into ``statistics.STATISTICS`` (it imports
``statistics``; ``statistics`` never imports it, so the two modules form no cycle), and so does
``survival`` (the Kaplan–Meier statistics and the log-rank statistic).
"""

from planrunner.engines import statistics, survival, teststats

__all__ = ["statistics", "survival", "teststats"]
