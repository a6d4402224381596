"""The cluster side: dispatch (local, address + TLS, SLURM/PBS), the runner and its attempt child, the scheduler plugin.

No torch models: workers import this part, never :mod:`forebear.engine`. The
scheduler plugin (:mod:`forebear.cluster.plugin`) hosts the loop inside a
scheduler and is the one module here that imports :mod:`forebear.loop`;
nothing in the loop imports it.
"""
