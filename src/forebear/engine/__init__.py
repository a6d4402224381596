"""The proposal engine: proposer, warm start, acquisition, surrogates.

No I/O and no Dask: the engine sees observations and returns configurations.
Imports :mod:`forebear.core` and (for history's tasks) :mod:`forebear.records`.
"""
