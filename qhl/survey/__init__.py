"""Surveys over many clusters: cutting clusters from structure files, learnability and
ergodicity diagnostics, resumable Dask scans and their plots.

Imports: everything below it (base ... learning).
"""
