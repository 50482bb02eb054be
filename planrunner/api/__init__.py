"""planrunner from Python, for notebooks and pipelines (README, "Python API").

    from planrunner import api
    result = api.run("plan.yaml")
    result["primary"].estimate, result.to_frame()

The same plan check, the same executors and the same record as the command line; nothing is
printed (unless ``run(progress=True)`` asks for the command line's progress bar) and nothing
exits: every problem is raised as the `planrunner.errors` class the command line maps to its
exit code, with the same located message (`str(error)`).
"""

from planrunner.api.session import AnalysisResult, CheckedPlan, Interval, RunResult, check, load, run

__all__ = ["AnalysisResult", "CheckedPlan", "Interval", "RunResult", "check", "load", "run"]
