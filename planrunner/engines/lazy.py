"""scipy, loaded the first time it is used.

Importing scipy.stats takes about half a second, scipy.special a tenth; printing the version or
checking a plan needs neither. The engines reach scipy through these stand-ins, which import it on
the first call. The functions called are scipy's own, so every number is unchanged. A run of the
common methods needs only scipy.special (beta quantiles of Monte Carlo p-values by `betaincinv`,
mid-ranks by our own `engines/ranks.py`); scipy.stats is imported only for the parametric bootstrap's
discrete models and the stated-precision boundaries.
"""

from __future__ import annotations

from typing import Any


class _Stats:
    """`scipy.stats`, imported at the first attribute access."""

    def __getattr__(self, name: str) -> Any:
        from scipy import stats as loaded
        return getattr(loaded, name)


stats: Any = _Stats()


def betaincinv(*args: Any, **kwargs: Any) -> Any:
    # the function scipy.stats.beta.ppf evaluates, the same bits (tests/test_ranks.py), without
    # importing scipy.stats
    from scipy.special import betaincinv as loaded
    return loaded(*args, **kwargs)


def ndtr(*args: Any, **kwargs: Any) -> Any:
    from scipy.special import ndtr as loaded
    return loaded(*args, **kwargs)


def ndtri(*args: Any, **kwargs: Any) -> Any:
    from scipy.special import ndtri as loaded
    return loaded(*args, **kwargs)


def gammaln(*args: Any, **kwargs: Any) -> Any:
    from scipy.special import gammaln as loaded
    return loaded(*args, **kwargs)
