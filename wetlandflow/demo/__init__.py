"""The demo: a synthetic, physically plausible landscape (the fictional Orlenmere Basin) with its truth.

:func:`make_demo` writes optical scenes, a SAR series, a DEM, plots and a project file for a run
(``landscape``; the spectra, sky and backscatter models live in ``spectra``); :func:`load_truth` reads the
generator's class map, the check of last resort that no real data set offers.  :func:`make_archive`
(``archive``) writes 35 years of synthetic summer scenes, a SAR season, monitoring sites and their planted
truths for the monitoring stage; :func:`monitor_table` gives the project file's ``[monitor]`` table.
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "landscape": ["demo_grid", "make_demo", "load_truth"],
    "archive": ["make_archive", "monitor_table", "sar_dates", "harvest_ndvi"],
})
