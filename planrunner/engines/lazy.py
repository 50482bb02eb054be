"""scipy, loaded the first time it is used.

Importing scipy.stats takes about half a second, scipy.special a tenth; printing the version or
checking a plan needs neither. The engines reach scipy through these stand-ins, which import it on
the first call. The functions called are scipy's own, so every number is unchanged.
"""

from __future__ import annotations

from typing import Any


class _Stats:
    """`scipy.stats`, imported at the first attribute access."""

    def __getattr__(self, name: str) -> Any:
        from scipy import stats as loaded
        return getattr(loaded, name)


stats: Any = _Stats()


def rankdata(*args: Any, **kwargs: Any) -> Any:
    from scipy.stats import rankdata as loaded
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
