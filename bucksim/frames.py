"""pandas views of the tabular results, pandas being an optional extra.

``pip install "bucksim[tables]"`` installs it. The results' ``to_pandas()``
methods call :func:`data_frame`; nothing imports pandas before then, so the
rest of bucksim works without it.
"""

from __future__ import annotations

EXTRA = "tables"


def require_pandas():
    """The pandas module, or an ImportError that names the extra to install."""
    try:
        import pandas
    except ImportError:
        raise ImportError(f"to_pandas() needs pandas, an optional extra of bucksim: "
                          f"pip install \"bucksim[{EXTRA}]\" (or pip install pandas)") from None
    return pandas


def data_frame(columns: dict):
    """A ``pandas.DataFrame`` from ``{name: values}`` (columns in the given order)."""
    return require_pandas().DataFrame(columns)
