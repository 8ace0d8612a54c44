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
    # ... and the edge lines of F0, which a chunk of one baseline window (as in warm_up) does not reach
    import numpy as _np

    from ..signal import delta_f_over_f

    delta_f_over_f(_np.linspace(2.0, 1.0, 600), 10.0, window_s=20.0)
except Exception:  # noqa: BLE001 - see the module docstring
    pass
