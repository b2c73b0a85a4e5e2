"""Values as strict JSON holds them: the one conversion every JSON file of the tool goes through."""

from __future__ import annotations

import datetime as dt
import math
import os

import numpy as np


def jsonable(obj):
    """A copy of a value that strict JSON can hold.

    Parameters
    ----------
    obj : object
        Any nesting of dicts, lists, tuples, numpy scalars and arrays, numbers, paths and dates.

    Returns
    -------
    object
        numpy scalars and arrays become Python numbers and lists, tuples become lists, dict keys
        become text, paths and dates become text, non-finite floats (undefined metrics) become None;
        anything else is returned as it is.
    """
    if isinstance(obj, str):
        return obj
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        return float(obj) if math.isfinite(obj) else None
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    if isinstance(obj, dt.date):
        return obj.isoformat()
    return obj
