"""Pure numerical engines: numpy/scipy only, no files, clock, printing, pandas or pydantic.

Importing any engine module runs this first, so the registry of statistics always holds the test
statistics too: ``teststats`` registers them into ``statistics.STATISTICS`` (it imports
``statistics``; ``statistics`` never imports it, so the two modules form no cycle).
"""

from planrunner.engines import statistics, teststats

__all__ = ["statistics", "teststats"]
