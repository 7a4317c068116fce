"""Small DataFrame helpers shared by pipeline/ and screens/ (pure, no I/O)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc


def isin(values: pd.Series, allowed) -> np.ndarray:
    """`values.isin(allowed)` for text keys (ids, lead names), as a bool array; missing is False.

    pandas 3's Arrow-backed strings turn every allowed value into a scalar one by one, which
    costs about a second per 200,000 ids; pyarrow's hash set does it in milliseconds."""
    arr = pa.array(values.astype("str"), from_pandas=True)
    if isinstance(allowed, (set, frozenset, dict)):
        allowed = list(allowed)
    keys = pa.array(allowed.astype("str") if isinstance(allowed, pd.Series) else
                    [str(v) for v in allowed if v is not None and v == v], from_pandas=True)
    if keys.type != arr.type:
        keys = keys.cast(arr.type)
    return pc.is_in(arr, value_set=keys).fill_null(False).to_numpy(zero_copy_only=False)


def positions(values: pd.Series, keys: pd.Series | np.ndarray) -> np.ndarray:
    """For each entry of `values`, its position in `keys` (unique text), -1 when absent or
    missing: `pd.Index(keys).get_indexer(values)` through pyarrow's hash table, for the same
    reason as isin (pandas 3 converts Arrow strings to Python objects first)."""
    arr = pa.array(pd.Series(values).astype("str"), from_pandas=True)
    ref = pa.array(pd.Series(keys).astype("str"), from_pandas=True)
    if ref.type != arr.type:
        ref = ref.cast(arr.type)
    return pc.index_in(arr, value_set=ref).fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)


def whole_years(born: pd.Series, at: pd.Series) -> pd.Series:
    """Age in whole years at `at` of someone born on `born` (both datetime Series, same index):
    the difference of the years, less one before that year's birthday (one born on 29 February
    has it on 1 March in other years). Float; NaN where either is missing. Only the calendar
    fields are read, so a tz-aware `at` and a naive birth date mix."""
    had_birthday = (at.dt.month > born.dt.month) | ((at.dt.month == born.dt.month) & (at.dt.day >= born.dt.day))
    years = at.dt.year - born.dt.year - (~had_birthday).astype(float)
    return years.astype(float).where(born.notna() & at.notna())
