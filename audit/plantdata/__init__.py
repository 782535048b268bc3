"""Plant data: logged time series read once (:mod:`.records`), and what is derived from them.

Modules
-------
records
    The one reader of every time-series record (CSV and Parquet): time, signals,
    units, historian quality words, order, gaps, flat runs; a :class:`~.records.Record`
    of uniform segments with notes naming file and line.
"""
