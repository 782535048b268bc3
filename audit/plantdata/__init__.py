"""Plant data: logged time series read once (:mod:`.records`), and what is derived from them.

Modules
-------
records
    The one reader of every time-series record (CSV and Parquet): time, signals,
    units, historian quality words, order, gaps, flat runs; a :class:`~.records.Record`
    of uniform segments with notes naming file and line.
use, oscillation, valve, variance
    Loop health from routine operation: time in automatic, saturation, range, set-point
    moves and variability; oscillation (autocorrelation regularity, half-cycle IAE); sticking
    valves (curve fitting, cross-correlation); the minimum-variance (Harris) index.
health
    All of them on one record (:func:`~.health.loop_health`) and the pipeline stage.
sources, loopdata
    Where a row's record comes from (its ``data_file`` or a site export,
    :func:`~.sources.record_for_row`), and the per-loop task that reads it once for the loop
    health and the model check (:func:`~.loopdata.loop_data`, on the run's executor).
"""
