"""Records: the logbook (the file-locked event log of a search, folded into a trial table) and history.

Imports only :mod:`forebear.core`.
"""
