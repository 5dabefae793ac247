"""Optical features: spectral indices of Sentinel-2-like surface reflectance.

Conventions
-----------
A reflectance stack is an ``xr.DataArray`` with dims ``("time", "band", "y", "x")``,
float32 surface reflectance (already scaled, NaN where masked) and a ``band``
coordinate holding the portable names in :data:`BANDS` (Sentinel-2 B02, B03,
B04, B05, B06, B07, B08, B8A, B11, B12).  Index functions take any array with
a ``band`` dim (a single scene, a stack, or a seasonal composite) and keep the
other dims, and stay lazy on dask input.

Seasonal compositing, season masks and the reflectance plausibility checks
live in :mod:`wetlandflow.features.composite`; they are re-exported here so
``optical.seasonal_composite`` and friends keep working.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import dask.array as da
import numba
import numpy as np
import xarray as xr

from .._provenance import with_attrs
from ..errors import DataQualityError, GridMismatchError
from ..inputs.seasons import season_mask  # noqa: F401  (re-exported)
from ._kernels import quiet_call
from .composite import (  # noqa: F401  (re-exported: the optical module's public API before the split)
    PLAUSIBILITY_LIMITS,
    check_reflectance,
    reflectance_plausibility,
    seasonal_composite,
)

BANDS: tuple[str, ...] = (
    "blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1", "swir2",
)  # fmt: skip
SENTINEL2_BAND: dict[str, str] = dict(
    zip(BANDS, ("B02", "B03", "B04", "B05", "B06", "B07", "B08", "B8A", "B11", "B12"), strict=True)
)

# Centre wavelengths (nm) of the bands REIP needs.  S2A/S2B values as tabulated
# in the Awesome Spectral Indices bands.json (spyndex 0.12.0), which follows
# ESA's Sentinel-2 spectral response document S2-SRF (COPE-GSEG-EOPG-TN-15-0007;
# the catalogue does not name the issue).  "nominal" are the rounded band
# centres used by the S2REP formula (Frampton et al. 2013).
CENTRE_WAVELENGTH_NM: dict[str, dict[str, float]] = {
    "S2A": {"red": 664.6, "re1": 704.1, "re2": 740.5, "re3": 782.8},
    "S2B": {"red": 665.0, "re1": 703.8, "re2": 739.1, "re3": 779.7},
    "nominal": {"red": 665.0, "re1": 705.0, "re2": 740.0, "re3": 783.0},
}
CENTRE_WAVELENGTH_SOURCE = (
    "Awesome Spectral Indices bands.json as shipped with spyndex 0.12.0, after ESA S2-SRF "
    "COPE-GSEG-EOPG-TN-15-0007 (issue not stated in the catalogue)"
)


# ---------------------------------------------------------------------------
# Band access
# ---------------------------------------------------------------------------


def _require_bands(reflectance: xr.DataArray, names: Sequence[str]) -> list[str]:
    """The band labels of ``reflectance``, after checking that ``names`` are all among them."""
    if "band" not in reflectance.dims:
        raise DataQualityError(
            f"expected an array with a 'band' dimension, received dims {reflectance.dims}. "
            "Pass the reflectance stack or composite, not a single-band layer."
        )
    present = [str(b) for b in reflectance["band"].values]
    for name in names:
        if name not in present:
            raise DataQualityError(
                f"band {name!r} is missing: the array has bands {present}; expected portable names from "
                f"{list(BANDS)}. Check the `bands` list of the [[optical]] tables in the project file."
            )
    return present


def _band(reflectance: xr.DataArray, name: str) -> xr.DataArray:
    """One band as an array without the ``band`` coordinate (so two bands combine cleanly)."""
    _require_bands(reflectance, [name])
    return reflectance.sel(band=name, drop=True)


# ---------------------------------------------------------------------------
# Kernels: element-wise ratios that never warn
# ---------------------------------------------------------------------------


# float32 input is computed in float64 (no overflow of a + b) and rounded once
# at the end.  The compiler may evaluate both sides of a branch (and so divide
# by zero in lanes whose result is discarded); NumPy would turn the resulting
# floating-point flags into RuntimeWarnings, so the blocks run under errstate.


@numba.vectorize(["float32(float32, float32)", "float64(float64, float64)"], cache=True)
def _nd_ufunc(a, b):  # pragma: no cover - compiled
    x = np.float64(a)
    y = np.float64(b)
    total = x + y
    if total == 0:
        return np.nan
    return (x - y) / total


@numba.vectorize(["float32(float32, float32)", "float64(float64, float64)"], cache=True)
def _ratio_ufunc(num, den):  # pragma: no cover - compiled
    if den == 0:
        return np.nan
    return np.float64(num) / np.float64(den)


# Module-level block functions (not closures): dask tokenises the function it
# maps, and a pickled closure would carry, and recompile, the numba ufunc.
def _nd_block(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return quiet_call(_nd_ufunc, a, b)


def _ratio_block(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    return quiet_call(_ratio_ufunc, num, den)


def _float_dtype(*arrays: xr.DataArray) -> np.dtype:
    dtype = np.result_type(*[a.dtype for a in arrays])
    return dtype if dtype in (np.float32, np.float64) else np.dtype(np.float64)


def _elementwise(func: Callable[..., np.ndarray], a: xr.DataArray, b: xr.DataArray) -> xr.DataArray:
    dtype = _float_dtype(a, b)
    try:
        xr.align(a, b, join="exact", copy=False)
    except ValueError as exc:
        raise GridMismatchError(
            f"the two inputs are not on the same grid ({exc}); align them onto the run's grid first."
        ) from exc
    return xr.apply_ufunc(
        func,
        a.astype(dtype, copy=False),
        b.astype(dtype, copy=False),
        dask="parallelized",
        output_dtypes=[dtype],
        join="exact",
    )


def safe_ratio(num: xr.DataArray, den: xr.DataArray) -> xr.DataArray:
    """``num / den`` with NaN where ``den == 0`` (no warning); lazy on dask input."""
    return _elementwise(_ratio_block, num, den)


# ---------------------------------------------------------------------------
# Normalised differences
# ---------------------------------------------------------------------------


def normalized_difference(
    a: xr.DataArray,
    b: xr.DataArray,
    *,
    name: str,
    long_name: str | None = None,
    formula: str = "(a - b) / (a + b)",
    reference: str = "",
    parameters: dict[str, Any] | None = None,
) -> xr.DataArray:
    """Normalised difference ``(a - b) / (a + b)``; NaN where ``a + b == 0``.

    Parameters
    ----------
    a, b : xarray.DataArray
        Arrays on the same grid (coordinates must match exactly).
    name : str
        Name of the output variable.
    long_name, formula, reference, parameters
        Provenance written to the output attrs.

    Returns
    -------
    xarray.DataArray
        Float32 for float32 input (float64 otherwise), in [-1, 1] for
        non-negative inputs; lazy when the inputs are dask-backed.

    Raises
    ------
    GridMismatchError
        If the coordinates of ``a`` and ``b`` differ.

    Examples
    --------
    >>> import xarray as xr
    >>> nir, red = xr.DataArray([0.643]), xr.DataArray([0.175])
    >>> float(normalized_difference(nir, red, name="ndvi")[0])  # doctest: +ELLIPSIS
    0.57212...
    """
    out = _elementwise(_nd_block, a, b)
    return with_attrs(
        out,
        name,
        long_name=long_name or name,
        units="1",
        domain="optical",
        formula=formula,
        reference=reference,
        parameters=parameters or {},
    )


# name: (band a, band b, long name, reference)
_ND_SPECS: dict[str, tuple[str, str, str, str]] = {
    "ndvi": (
        "nir", "red", "Normalized difference vegetation index",
        "Rouse, Haas, Schell & Deering (1974) Monitoring vegetation systems in the Great Plains with ERTS, "
        "Third ERTS Symposium, NASA SP-351, 309-317",
    ),
    "ndwi_mcfeeters": (
        "green", "nir", "Normalized difference water index (McFeeters, green/NIR)",
        "McFeeters (1996) The use of the normalized difference water index (NDWI) in the delineation of "
        "open water features, International Journal of Remote Sensing 17(7), 1425-1432",
    ),
    "ndmi": (
        "nir", "swir1", "Normalized difference moisture index (NIR/SWIR1; the NDMI/LSWI form)",
        "Wilson & Sader (2002) Detection of forest harvest type using multiple dates of Landsat TM "
        "imagery, Remote Sensing of Environment 80, 385-396; after Gao (1996) NDWI - A normalized "
        "difference water index for remote sensing of vegetation liquid water from space, Remote "
        "Sensing of Environment 58, 257-266",
    ),
    "mndwi": (
        "green", "swir1", "Modified normalized difference water index",
        "Xu (2006) Modification of normalised difference water index (NDWI) to enhance open water "
        "features in remotely sensed imagery, International Journal of Remote Sensing 27(14), 3025-3033",
    ),
    "ndre1": (
        "nir", "re1", "Normalized difference red-edge index (B08, B05)",
        "Gitelson & Merzlyak (1994) Quantitative estimation of chlorophyll-a using reflectance spectra: "
        "experiments with autumn chestnut and maple leaves, Journal of Photochemistry and "
        "Photobiology B 22(3), 247-252",
    ),
    "ndre2": (
        "nir", "re2", "Normalized difference red-edge index (B08, B06)",
        "Gitelson & Merzlyak (1994), form of the NDRE with Sentinel-2 B06 in place of B05",
    ),
}  # fmt: skip


def _nd_provenance(name: str, band_a: str, band_b: str) -> dict[str, Any]:
    """Provenance of the normalised difference ``name`` of two bands, from :data:`_ND_SPECS` when listed."""
    spec = _ND_SPECS.get(name)
    if spec is not None and spec[:2] != (band_a, band_b):
        raise ValueError(
            f"{name!r} is defined as ({spec[0]} - {spec[1]}) / ({spec[0]} + {spec[1]}), received the band "
            f"pair ({band_a!r}, {band_b!r}); use that pair or give the index another name."
        )
    return {
        "long_name": spec[2] if spec else f"Normalized difference of {band_a} and {band_b}",
        "units": "1",
        "domain": "optical",
        "formula": f"({band_a} - {band_b}) / ({band_a} + {band_b})",
        "reference": spec[3] if spec else "",
        "parameters": {
            "bands": [band_a, band_b],
            "sentinel2": [SENTINEL2_BAND.get(band_a), SENTINEL2_BAND.get(band_b)],
        },
    }


def _nd_index(reflectance: xr.DataArray, name: str) -> xr.DataArray:
    band_a, band_b = _ND_SPECS[name][:2]
    out = _elementwise(_nd_block, _band(reflectance, band_a), _band(reflectance, band_b))
    return with_attrs(out, name, **_nd_provenance(name, band_a, band_b))


def ndvi(reflectance: xr.DataArray) -> xr.DataArray:
    """NDVI = (nir - red) / (nir + red) (Rouse et al. 1974), Sentinel-2 B08 and B04.

    Parameters
    ----------
    reflectance : xarray.DataArray
        Surface reflectance with a ``band`` dim holding ``nir`` and ``red``.

    Returns
    -------
    xarray.DataArray
        The index with the ``band`` dim removed (other dims kept), attrs fresh.
    """
    return _nd_index(reflectance, "ndvi")


def ndwi_mcfeeters(reflectance: xr.DataArray) -> xr.DataArray:
    """McFeeters' NDWI = (green - nir) / (green + nir) (McFeeters 1996), B03 and B08.

    Open water is positive; vegetation and soil negative.  Not Gao's NDWI (see :func:`ndmi`).
    """
    return _nd_index(reflectance, "ndwi_mcfeeters")


def ndmi(reflectance: xr.DataArray) -> xr.DataArray:
    """NDMI = (nir - swir1) / (nir + swir1), Sentinel-2 B08 and B11.

    Gao's (1996) NDWI used a 1.24 um band, which Sentinel-2 lacks; with the
    1.61 um band (B11) the same formula is the NDMI / LSWI of the index
    catalogues, so it is named ``ndmi`` here to avoid confusion with
    McFeeters' green/NIR NDWI.
    """
    return _nd_index(reflectance, "ndmi")


def mndwi(reflectance: xr.DataArray) -> xr.DataArray:
    """MNDWI = (green - swir1) / (green + swir1) (Xu 2006), B03 and B11."""
    return _nd_index(reflectance, "mndwi")


def ndre1(reflectance: xr.DataArray) -> xr.DataArray:
    """NDRE1 = (nir - re1) / (nir + re1), Sentinel-2 B08 and B05 (the catalogue's NDREI)."""
    return _nd_index(reflectance, "ndre1")


def ndre2(reflectance: xr.DataArray) -> xr.DataArray:
    """NDRE2 = (nir - re2) / (nir + re2), Sentinel-2 B08 and B06."""
    return _nd_index(reflectance, "ndre2")


# ---------------------------------------------------------------------------
# Several normalised differences in one pass
# ---------------------------------------------------------------------------

# Rows per tile: about 32 kB of each band (8 rows of a 1024-pixel float32
# chunk), so the bands an index reads are still in L1/L2 when the next index
# reads them again.
_TILE_BYTES = 32768


@numba.njit(cache=True)
def _nd_rows(bands, r_in, ia, ib, out, r_out, nrows):  # pragma: no cover - compiled
    """``out[j, r_out + k] = nd(bands[ia[j], r_in + k], bands[ib[j], r_in + k])`` for ``k < nrows``.

    The arithmetic is that of :func:`_nd_ufunc` (float64, one rounding at the
    end), so results are identical to the single-index functions; a compiled
    loop raises no floating-point warning.
    """
    for j in range(ia.shape[0]):
        for k in range(nrows):
            a = bands[ia[j], r_in + k]
            b = bands[ib[j], r_in + k]
            o = out[j, r_out + k]
            for i in range(a.shape[0]):
                x = np.float64(a[i])
                y = np.float64(b[i])
                total = x + y
                o[i] = (x - y) / total if total != 0 else np.nan


def _nd_fused_py(bands, ia, ib, used, out, tile, staged, nruns):  # pragma: no cover - compiled below
    """Normalised differences of band pairs over ``bands`` ``(band, rows, x)``, ``tile`` rows at a time.

    The tiles are split into ``nruns`` runs of consecutive tiles (one per
    thread in the parallel build), each with its own staging buffer.

    A C-contiguous block (a chunk that is its own array, a Zarr chunk, a
    composite) is read in place (``staged`` false).  Otherwise (a chunk
    viewed inside a larger array, whose rows lie far apart: each row a new
    page, the hardware prefetcher restarting every time, and a strided loop
    that does not vectorise) the bands in ``used`` are first copied tile by
    tile into a small contiguous buffer, which the copy loop reads at close
    to memory speed.
    """
    nb, ny, nx = bands.shape
    ntiles = (ny + tile - 1) // tile
    nruns = max(1, min(ntiles, nruns))
    for run in numba.prange(nruns):
        buf = np.empty((nb, tile if staged else 0, nx), dtype=bands.dtype)
        for t in range(run * ntiles // nruns, (run + 1) * ntiles // nruns):
            r0 = t * tile
            m = min(tile, ny - r0)
            if staged:
                for u in range(used.shape[0]):
                    for k in range(m):
                        buf[used[u], k, :] = bands[used[u], r0 + k, :]
                _nd_rows(buf, 0, ia, ib, out, r0, m)
            else:
                _nd_rows(bands, r0, ia, ib, out, r0, m)


# Two builds of one loop: dask chunks run the serial one (dask's threads
# already use the cores; nested OpenMP threads would only contend), which
# releases the GIL so that those threads run chunks side by side; a whole
# in-memory array runs the parallel one.  The output is allocated by NumPy, which
# asks for huge pages on large arrays: fewer page faults than an allocation
# inside the compiled function.
_nd_fused_serial = numba.njit(cache=True, nogil=True)(_nd_fused_py)
_nd_fused_parallel = numba.njit(cache=True, parallel=True)(_nd_fused_py)


def _as_planes(block: np.ndarray) -> np.ndarray:
    """``(band, ...)`` as ``(band, lead, rows, x)``: a view for the usual layouts (leading dims merged)."""
    if block.ndim == 1:
        return block.reshape(-1, 1, 1, 1)
    if block.ndim == 2:
        return block[:, None, None, :]
    return block.reshape((block.shape[0], -1) + block.shape[-2:])


def nd_fused_block(block: np.ndarray, ia: np.ndarray, ib: np.ndarray, *, parallel: bool = True) -> np.ndarray:
    """Normalised differences of band pairs ``(ia[j], ib[j])`` of a band-first NumPy block.

    Parameters
    ----------
    block : numpy.ndarray
        ``(band, ...)`` float32 or float64, any strides (read in place where
        the bands of one leading index form a C-contiguous block, else staged
        tile by tile through a small buffer).
    ia, ib : numpy.ndarray
        int64 positions along the band axis of the first and second band of each index.
    parallel : bool
        Spread the tiles over numba's threads (off inside dask tasks).

    Returns
    -------
    numpy.ndarray
        ``(len(ia), ...)``, same dtype as ``block``; C-contiguous for a single
        plane (``block`` of ndim <= 3), else a view of a ``(lead, index, rows, x)`` array.
    """
    planes = _as_planes(block)
    nlead, ny, nx = planes.shape[1:]
    out = np.empty((nlead, ia.shape[0], ny, nx), dtype=block.dtype)
    tile = max(1, min(ny, _TILE_BYTES // (nx * planes.itemsize)))
    used = np.unique(np.concatenate([ia, ib])).astype(np.int64)
    kernel, nruns = (_nd_fused_parallel, numba.get_num_threads()) if parallel else (_nd_fused_serial, 1)
    # One call per leading index (season, date: a handful), so that each call
    # sees (band, rows, x) blocks that are C-contiguous for the usual layouts
    # (the compiled loops then vectorise).
    for lead in range(nlead):
        src = planes[:, lead]
        kernel(src, ia, ib, used, out[lead], tile, not src.flags.c_contiguous, nruns)
    return np.moveaxis(out, 1, 0).reshape((ia.shape[0],) + block.shape[1:])


def normalized_differences(
    reflectance: xr.DataArray, pairs: Mapping[str, tuple[str, str]]
) -> xr.Dataset:
    """Several normalised differences ``(a - b) / (a + b)`` in one pass over the bands.

    Equal to calling :func:`normalized_difference` once per pair (NaN where
    ``a + b == 0``), but one compiled loop reads each block of pixels once
    for all indices: a dask-backed input gets one task per chunk (the band
    dim is rechunked to a single chunk if needed).

    Parameters
    ----------
    reflectance : xarray.DataArray
        Array with a ``band`` dim (any other dims: scene, stack or composite).
    pairs : mapping of str to (str, str)
        Output name to ``(band_a, band_b)``.  Names listed in the index table
        (``ndvi``, ``ndmi``, ...) must use their defined pair and get its
        long name and reference; other names get a generic description.

    Returns
    -------
    xarray.Dataset
        One variable per pair with the dims of ``reflectance`` minus ``band``,
        float32 for float32 input (float64 otherwise), fresh provenance attrs;
        lazy on dask input.

    Examples
    --------
    >>> import xarray as xr
    >>> r = xr.DataArray([[0.175], [0.643]], dims=("band", "x"), coords={"band": ["red", "nir"]})
    >>> float(normalized_differences(r, {"ndvi": ("nir", "red")})["ndvi"][0])  # doctest: +ELLIPSIS
    0.57212...
    """
    if not pairs:
        raise ValueError("pairs is empty; give at least one, e.g. {'ndvi': ('nir', 'red')}")
    present = _require_bands(reflectance, [b for pair in pairs.values() for b in pair])
    provenance = {n: _nd_provenance(n, a, b) for n, (a, b) in pairs.items()}
    planes = _nd_planes(reflectance, [present.index(a) for a, _ in pairs.values()],
                        [present.index(b) for _, b in pairs.values()])
    return xr.Dataset({n: with_attrs(p, n, **provenance[n]) for n, p in zip(pairs, planes, strict=True)})


def _index_plane(blocks: list[np.ndarray], j: int) -> np.ndarray:
    """Index ``j`` of the (single) fused block along the index axis, as a view."""
    return blocks[0][j]


def _nd_planes(reflectance: xr.DataArray, ia: list[int], ib: list[int]) -> list[xr.DataArray]:
    """The fused kernel over ``reflectance`` (band moved first): one array per band pair, ``band`` dropped.

    On dask input one task per chunk computes every index; each output then
    takes its plane of that task's block as a view, so nothing is copied
    before the outputs reach their destination (a Zarr store, ``.compute()``).
    """
    r = reflectance.transpose("band", ...)
    r = r.astype(_float_dtype(r), copy=False)
    pos_a, pos_b = np.asarray(ia, dtype=np.int64), np.asarray(ib, dtype=np.int64)
    if r.chunks is not None:
        fused = r.data.rechunk({0: -1}).map_blocks(
            nd_fused_block, pos_a, pos_b, parallel=False, chunks=((len(ia),),) + r.data.chunks[1:],
            dtype=r.dtype,
        )
        # Not fused[j]: dask's getitem copies a selection smaller than half its
        # block.  A blockwise task with the index axis contracted and not
        # concatenated (a concatenation would copy too) takes a view instead.
        axes = tuple(range(fused.ndim))
        data = [da.blockwise(_index_plane, axes[1:], fused, axes, j, None, concatenate=False,
                             dtype=r.dtype, meta=np.empty((0,) * (fused.ndim - 1), dtype=r.dtype))
                for j in range(len(ia))]
    else:
        fused = nd_fused_block(np.asarray(r.data), pos_a, pos_b)
        data = list(fused)
    coords = {k: c for k, c in r.coords.items() if "band" not in c.dims and k != "band"}
    return [xr.DataArray(d, dims=r.dims[1:], coords=coords) for d in data]


# ---------------------------------------------------------------------------
# Red-edge inflection point
# ---------------------------------------------------------------------------


def reip(reflectance: xr.DataArray, *, centres: str = "S2A", clip: bool = False) -> xr.DataArray:
    """Red-edge inflection point (nm) by linear interpolation (Guyot & Baret 1988).

    The inflection reflectance is taken midway between the red trough and the
    NIR shoulder, ``R_ip = (red + re3) / 2`` (B04, B07), and its wavelength is
    interpolated linearly between the two red-edge bands B05 and B06::

        REIP = l5 + (l6 - l5) * (R_ip - re1) / (re2 - re1)

    With nominal centres (705, 740 nm) this is exactly the S2REP of Frampton
    et al. (2013); with the S2A centres it is ``704.1 + 36.4 * (...)``.  By
    default the result is not clipped: values outside [l5, l6] mean the
    inflection lies outside the two bands (extrapolated; water and bare soil,
    where re2 is close to re1, give long tails).  NaN where ``re2 == re1``.

    Parameters
    ----------
    reflectance : xarray.DataArray
        Surface reflectance with a ``band`` dim holding red, re1, re2, re3.
    centres : {"S2A", "S2B", "nominal"}
        Which band-centre wavelengths to use (:data:`CENTRE_WAVELENGTH_NM`).
    clip : bool
        Clip to [l5, l6] (a project choice that bounds the tails; not part of the published formula).

    Returns
    -------
    xarray.DataArray
        REIP in nm, dims of ``reflectance`` without ``band``.

    References
    ----------
    Guyot, G., Baret, F. (1988). Utilisation de la haute resolution spectrale pour suivre l'etat
    des couverts vegetaux. Proc. 4th Int. Colloquium on Spectral Signatures of Objects in Remote
    Sensing, ESA SP-287, 279-286 (formula not verified in the original).
    Frampton, W. J., Dash, J., Watmough, G., Milton, E. J. (2013). Evaluating the capabilities of
    Sentinel-2 for quantitative estimation of biophysical variables in vegetation. ISPRS Journal
    of Photogrammetry and Remote Sensing 82, 83-92.
    """
    if centres not in CENTRE_WAVELENGTH_NM:
        raise ValueError(f"centres must be one of {sorted(CENTRE_WAVELENGTH_NM)}, received {centres!r}")
    lam = CENTRE_WAVELENGTH_NM[centres]
    red, re1, re2, re3 = (_band(reflectance, b) for b in ("red", "re1", "re2", "re3"))
    fraction = safe_ratio((red + re3) / 2 - re1, re2 - re1)
    out = lam["re1"] + (lam["re2"] - lam["re1"]) * (fraction.clip(0, 1) if clip else fraction)
    return with_attrs(
        out.astype(fraction.dtype),
        "reip",
        long_name="Red-edge inflection point (linear interpolation)",
        units="nm",
        domain="optical",
        formula=f"{lam['re1']} + {lam['re2'] - lam['re1']:.1f} * ((red + re3) / 2 - re1) / (re2 - re1)",
        reference="Guyot & Baret (1988) Utilisation de la haute resolution spectrale pour suivre l'etat "
        "des couverts vegetaux, ESA SP-287, 279-286",
        parameters={
            "centres": centres,
            "clip": clip,
            "wavelength_nm": lam,
            "wavelength_source": CENTRE_WAVELENGTH_SOURCE,
        },
    )


OPTICAL_INDICES: dict[str, Callable[[xr.DataArray], xr.DataArray]] = {
    "ndvi": ndvi,
    "ndwi_mcfeeters": ndwi_mcfeeters,
    "ndmi": ndmi,
    "mndwi": mndwi,
    "ndre1": ndre1,
    "ndre2": ndre2,
    "reip": reip,
}


def optical_indices(reflectance: xr.DataArray, names: list[str] | None = None) -> xr.Dataset:
    """Compute several indices from :data:`OPTICAL_INDICES` into one Dataset.

    Parameters
    ----------
    reflectance : xarray.DataArray
        Array with a ``band`` dim (scene, stack or seasonal composite).
    names : list of str, optional
        Index names; all registered indices when omitted.

    Returns
    -------
    xarray.Dataset
        One variable per index, dims of ``reflectance`` without ``band``.
    """
    names = list(OPTICAL_INDICES) if names is None else names
    unknown = [n for n in names if n not in OPTICAL_INDICES]
    if unknown:
        raise ValueError(f"unknown optical indices {unknown}; available: {sorted(OPTICAL_INDICES)}")
    # the normalised differences in one fused pass; the others one by one
    fused = {n: _ND_SPECS[n][:2] for n in names if n in _ND_SPECS}
    done = normalized_differences(reflectance, fused) if fused else xr.Dataset()
    return xr.Dataset({n: done[n] if n in fused else OPTICAL_INDICES[n](reflectance) for n in names})


def season_difference(
    index_ds: xr.Dataset | xr.DataArray, a: str = "spring", b: str = "summer"
) -> xr.Dataset | xr.DataArray:
    """Difference between two seasons, ``index(a) - index(b)``, per variable.

    Parameters
    ----------
    index_ds : xarray.Dataset or xarray.DataArray
        Indices with a ``season`` dim (e.g. from :func:`optical_indices` on a composite).
    a, b : str
        Season labels.

    Returns
    -------
    xarray.Dataset or xarray.DataArray
        Variables named ``{name}_{a}_minus_{b}`` in the units of the input; a
        DataArray in gives a DataArray out.
    """
    if isinstance(index_ds, xr.DataArray):
        name = str(index_ds.name or "index")
        return season_difference(index_ds.to_dataset(name=name), a, b)[f"{name}_{a}_minus_{b}"]
    ds = index_ds
    if "season" not in ds.dims:
        raise ValueError(f"expected a 'season' dimension, received dims {tuple(ds.dims)}")
    seasons = [str(s) for s in ds["season"].values]
    for s in (a, b):
        if s not in seasons:
            raise ValueError(f"season {s!r} not in the data; available seasons: {seasons}")
    out = {}
    for name, var in ds.data_vars.items():
        diff = var.sel(season=a, drop=True) - var.sel(season=b, drop=True)
        new = f"{name}_{a}_minus_{b}"
        out[new] = with_attrs(
            diff,
            new,
            long_name=f"{var.attrs.get('long_name', name)}, {a} minus {b}",
            units=var.attrs.get("units", "1"),
            domain="optical",
            formula=f"{name}[{a}] - {name}[{b}]",
            reference=var.attrs.get("reference", ""),
            parameters={"a": a, "b": b},
        )
    return xr.Dataset(out)


def band_medians(composite: xr.Dataset) -> xr.Dataset:
    """The seasonal median reflectance of each band as features (``red_summer``, ``nir_all``).

    Useful where the bands allow few indices (RGB, RGB+NIR data).  Stays lazy on dask input.

    Parameters
    ----------
    composite : xarray.Dataset
        From :func:`seasonal_composite`: ``reflectance`` with dims ``("season", "band", "y", "x")``.

    Returns
    -------
    xarray.Dataset
        One variable per band and season, surface reflectance (units "1").
    """
    refl = composite["reflectance"]
    out = {}
    for season in refl["season"].values:
        for band in refl["band"].values:
            name = f"{band}_{season}"
            out[name] = with_attrs(
                refl.sel(season=season, band=band, drop=True), name,
                long_name=f"{band} surface reflectance, {season} median", units="1", domain="optical",
                method="per-pixel median of the season's valid observations (seasonal composite)",
                reference="", parameters={"band": str(band), "season": str(season),
                                          "sentinel2": SENTINEL2_BAND.get(str(band))})
    return xr.Dataset(out)
