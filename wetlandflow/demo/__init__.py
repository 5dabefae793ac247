"""The demo: a synthetic, physically plausible landscape (the fictional Orlenmere Basin) with its truth.

:func:`make_demo` writes optical scenes, a SAR series, a DEM, plots and a project file for a run
(``landscape``; the spectra, sky and backscatter models live in ``spectra``); :func:`load_truth` reads the
generator's class map, the check of last resort that no real data set offers.
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "landscape": ["demo_grid", "make_demo", "load_truth"],
})
