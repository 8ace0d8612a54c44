"""Imported by the process that forks the pipeline's workers: loads and warms up the per-chunk stages once.

:mod:`calcium.pipeline.executors` names this module in
:func:`multiprocessing.set_forkserver_preload`. The fork server imports it
once when it starts; every worker is then forked with the science modules
imported and their compiled functions loaded, instead of spending its first
second or two on that. Importing it anywhere else only costs that warm-up.
A failure here must never stop the server (the workers would then load
everything themselves), so it is swallowed.
"""
try:
    from .stages import warm_up

    warm_up()
except Exception:  # noqa: BLE001 - see the module docstring
    pass
