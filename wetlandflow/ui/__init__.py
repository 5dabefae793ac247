"""Stage 8, user interfaces: the command line, the notebook widget panels, previews and the doctor.

Thin faces over the library: ``cli`` (``wetlandflow check | run | demo | sample | assess | compare | report |
doctor``), ``widgets`` (ipywidgets panels that run library functions as background jobs), ``previews``
(quick-look figures of inputs and outputs for notebooks) and ``doctor`` (the installed stack).  Nothing
but this package imports it.
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "cli": ["main"],
    "doctor": ["doctor_report"],
})
