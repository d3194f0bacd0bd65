"""Fits of whole archives on an existing distributed engine (Dask), outside the model core.

``mixture/`` stays pure numpy/scipy; this package lends its batch EM a sweep whose E-step runs
on a Dask cluster (:mod:`archive.dask_fit`). It needs the optional extra ``mixroute[dask]``.
"""
