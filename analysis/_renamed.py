"""Keywords renamed to their ``Parameters`` names: the old name keeps working for a while, with a warning.

A parameter has one name from :class:`~tenfold.analysis.Parameters` down to the stage that uses it
(``ring_order``, ``ring_radius_px``, ``ladder_r_max_px``, ``tiling_edge_px``). Stage functions that used shorter
names (``order``, ``radius_px``, ``r_max_px``, ``edge_px``) accept them still, as deprecated aliases.
"""

from __future__ import annotations

import functools
import warnings

from ._errors import TenfoldInputError

__all__ = ["renamed_keywords"]


def renamed_keywords(**old_to_new: str):
    """Decorator: accept each old keyword as its new name, with a ``DeprecationWarning``.

    Examples
    --------
    >>> @renamed_keywords(order="ring_order")
    ... def f(*, ring_order=10):
    ...     return ring_order
    >>> import warnings
    >>> with warnings.catch_warnings(record=True) as caught:
    ...     warnings.simplefilter("always")
    ...     f(order=5), caught[0].category.__name__
    (5, 'DeprecationWarning')
    """
    def decorate(func):
        @functools.wraps(func)
        def wrapper(*args, **kwargs):
            for old, new in old_to_new.items():
                if old not in kwargs:
                    continue
                if new in kwargs:
                    raise TenfoldInputError(f"{func.__name__}: {old} is the old name of {new}; give {new} only")
                warnings.warn(f"{func.__name__}: the keyword {old} is deprecated, use {new}", DeprecationWarning,
                              stacklevel=2)
                kwargs[new] = kwargs.pop(old)
            return func(*args, **kwargs)

        return wrapper

    return decorate
