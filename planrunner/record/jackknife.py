"""Record adapter of a `JackknifeResult`: estimate, standard error, bias, the bias-corrected
estimate, and the distribution of the pseudo-values."""

from __future__ import annotations

import numpy as np

from planrunner.engines.results import JackknifeResult
from planrunner.record.canonical import plain_number as _f
from planrunner.record.fields import MethodFields, distribution_summary


def jackknife_fields(result: JackknifeResult, bins: int) -> MethodFields:
    return MethodFields(
        estimate=_f(result.estimate), standard_error=_f(result.standard_error), bias=_f(result.bias),
        details={"corrected_estimate": _f(result.corrected_estimate), "units": [int(k) for k in result.n]},
        distribution=distribution_summary("jackknife pseudo-values", np.concatenate(result.pseudo_values), bins),
    )
