"""Pure numerical engines: numpy/scipy only, no files, clock, printing, pandas or pydantic."""

from planrunner.engines.bootstrap import bootstrap
from planrunner.engines.jackknife import jackknife, jackknife_replicates
from planrunner.engines.permutation import permutation_test
from planrunner.engines.results import (
    BootstrapResult,
    EngineWarning,
    Interval,
    JackknifeResult,
    PermutationResult,
)
from planrunner.engines.statistics import STATISTICS, Statistic, get_statistic
from planrunner.engines.streams import DRAW_BLOCK, GENERATOR, Stream, analysis_key, stream_for

__all__ = [
    "DRAW_BLOCK",
    "GENERATOR",
    "STATISTICS",
    "BootstrapResult",
    "EngineWarning",
    "Interval",
    "JackknifeResult",
    "PermutationResult",
    "Statistic",
    "Stream",
    "analysis_key",
    "bootstrap",
    "get_statistic",
    "jackknife",
    "jackknife_replicates",
    "permutation_test",
    "stream_for",
]
