"""Optical features: seasonal composites, spectral indices, reflectance sanity checks.

Conventions
-----------
A reflectance stack is an ``xr.DataArray`` with dims ``("time", "band", "y", "x")``,
float32 surface reflectance (already scaled, NaN where masked) and a ``band``
coordinate holding the portable names in :data:`BANDS` (Sentinel-2 B02, B03,
B04, B05, B06, B07, B08, B8A, B11, B12).  Index functions take any array with
a ``band`` dim (a single scene, a stack, or a seasonal composite) and keep the
other dims.  Everything stays lazy on dask input except the plausibility
checks, which reduce each scene to a few numbers and so compute.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from types import MappingProxyType
from typing import Any

import numba
import numpy as np
import xarray as xr

from .._provenance import with_attrs
from ..errors import DataQualityError, GridMismatchError
from ._kernels import nanmedian_time, quiet_call

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

_OFFSET_HINT = (
    "reflectance = (DN + offset_dn) * scale; Sentinel-2 L2A products from processing baseline 04.00 "
    "(2022) on carry offset_dn = -1000, earlier ones 0 (from memory; check the product metadata "
    "BOA_ADD_OFFSET)"
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
        "Gitelson & Merzlyak (1994) Spectral reflectance changes associated with autumn senescence of "
        "Aesculus hippocastanum L. and Acer platanoides L. leaves, Journal of Photochemistry and "
        "Photobiology B 22, 247-252",
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

def _nd_fused_py(bands, ia, ib, out):  # pragma: no cover - compiled below
    """``out[j] = (bands[ia[j]] - bands[ib[j]]) / (... + ...)`` for every j, NaN where the sum is 0.

    ``bands`` is ``(band, rows, x)`` with any strides (a dask chunk sliced out
    of a larger array is read in place), ``out`` ``(len(ia), rows, x)``.  One
    row of every band (a few tens of kB) stays in cache while each index
    reads its two bands from it.  The arithmetic is that of :func:`_nd_ufunc`
    (float64, one rounding at the end), so results are identical to the
    single-index functions; a compiled loop raises no floating-point warning.
    """
    for r in numba.prange(bands.shape[1]):
        for j in range(ia.shape[0]):
            a = bands[ia[j], r]
            b = bands[ib[j], r]
            o = out[j, r]
            for i in range(a.shape[0]):
                x = np.float64(a[i])
                y = np.float64(b[i])
                total = x + y
                o[i] = (x - y) / total if total != 0 else np.nan


# Two builds of one loop: dask chunks run the serial one (dask's threads
# already use the cores; nested OpenMP threads would only contend), a whole
# in-memory array the parallel one.  The output is allocated by NumPy, which
# asks for huge pages on large arrays: fewer page faults than an allocation
# inside the compiled function.
_nd_fused_serial = numba.njit(cache=True)(_nd_fused_py)
_nd_fused_parallel = numba.njit(cache=True, parallel=True)(_nd_fused_py)


def nd_fused_block(block: np.ndarray, ia: np.ndarray, ib: np.ndarray, *, parallel: bool = True) -> np.ndarray:
    """Normalised differences of band pairs ``(ia[j], ib[j])`` of a band-first NumPy block.

    Parameters
    ----------
    block : numpy.ndarray
        ``(band, ...)`` float32 or float64, any strides (read in place when the leading dims merge).
    ia, ib : numpy.ndarray
        int64 positions along the band axis of the first and second band of each index.
    parallel : bool
        Spread the pixels over numba's threads (off inside dask tasks).

    Returns
    -------
    numpy.ndarray
        ``(len(ia), ...)``, same dtype as ``block``.
    """
    # (band, rows, x): a view for the usual layouts (last axis kept, leading ones merged)
    rows = block.reshape(block.shape[0], -1, block.shape[-1]) if block.ndim > 1 else block.reshape(-1, 1, 1)
    out = np.empty((ia.shape[0],) + rows.shape[1:], dtype=block.dtype)
    (_nd_fused_parallel if parallel else _nd_fused_serial)(rows, ia, ib, out)
    return out.reshape((ia.shape[0],) + block.shape[1:])


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
    stacked = _nd_stack(reflectance, [present.index(a) for a, _ in pairs.values()],
                        [present.index(b) for _, b in pairs.values()], list(pairs))
    order = [d for d in reflectance.dims if d != "band"]
    return xr.Dataset(
        {n: with_attrs(stacked.sel(index=n, drop=True).transpose(*order), n, **provenance[n]) for n in pairs}
    )


def _nd_stack(reflectance: xr.DataArray, ia: list[int], ib: list[int], names: list[str]) -> xr.DataArray:
    """The fused kernel over ``reflectance`` (band moved first): an ``index`` dim in place of ``band``."""
    r = reflectance.transpose("band", ...)
    r = r.astype(_float_dtype(r), copy=False)
    pos_a, pos_b = np.asarray(ia, dtype=np.int64), np.asarray(ib, dtype=np.int64)
    if r.chunks is not None:
        data = r.data.rechunk({0: -1}).map_blocks(
            nd_fused_block, pos_a, pos_b, parallel=False, chunks=((len(names),),) + r.data.chunks[1:],
            dtype=r.dtype,
        )
    else:
        data = nd_fused_block(np.asarray(r.data), pos_a, pos_b)
    coords = {k: c for k, c in r.coords.items() if "band" not in c.dims and k != "band"}
    return xr.DataArray(data, dims=("index", *r.dims[1:]), coords={**coords, "index": names})


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
    Sensing, ESA SP-287, 279-286 (formula from memory, not checked in the original).
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


# ---------------------------------------------------------------------------
# Seasonal composites
# ---------------------------------------------------------------------------


def _month_day(text: str) -> int:
    """'MM-DD' -> MM * 100 + DD, validated."""
    try:
        month, day = (int(p) for p in text.split("-"))
    except (ValueError, AttributeError):
        month = day = -1
    if not (1 <= month <= 12 and 1 <= day <= 31):
        raise ValueError(f"season bounds must be 'MM-DD' strings such as '04-01', received {text!r}")
    return month * 100 + day


def season_mask(times: xr.DataArray | np.ndarray, start: str, end: str) -> np.ndarray:
    """Boolean mask of the dates whose month-day lies in ``[start, end]`` (inclusive).

    A window whose start is later than its end wraps over the new year
    (``("12-01", "02-28")`` is winter).
    """
    t = np.asarray(times, dtype="datetime64[D]")
    months = t.astype("datetime64[M]").astype(int) % 12 + 1
    days = (t - t.astype("datetime64[M]")).astype(int) + 1
    md = months * 100 + days
    lo, hi = _month_day(start), _month_day(end)
    return (md >= lo) & (md <= hi) if lo <= hi else (md >= lo) | (md <= hi)


def _require_stack(stack: xr.DataArray) -> None:
    if tuple(stack.dims) != ("time", "band", "y", "x"):
        raise DataQualityError(
            f"expected a reflectance stack with dims ('time', 'band', 'y', 'x'), received {stack.dims}. "
            "Transpose with stack.transpose('time', 'band', 'y', 'x')."
        )


def seasonal_composite(stack: xr.DataArray, seasons: Mapping[str, tuple[str, str]]) -> xr.Dataset:
    """Per-pixel median of the valid observations in each season.

    Parameters
    ----------
    stack : xarray.DataArray
        Reflectance stack ``("time", "band", "y", "x")``, NaN where masked; lazy input stays lazy.
    seasons : mapping of str to (str, str)
        Season name to an inclusive ``("MM-DD", "MM-DD")`` window.

    Returns
    -------
    xarray.Dataset
        ``reflectance`` ``("season", "band", "y", "x")``: median of the non-NaN
        values per band (NaN where a pixel has none); ``valid_count``
        ``("season", "y", "x")`` int16: number of scenes in which the pixel is
        finite in every band.  Coordinates ``season_start``, ``season_end`` and
        ``n_scenes`` ride along the season dim.

    Raises
    ------
    DataQualityError
        If a season window holds no scene (the message lists the scene dates).
    """
    _require_stack(stack)
    if not seasons:
        raise ValueError("seasons is empty; give at least one, e.g. {'summer': ('06-11', '08-20')}")
    dates = [str(d)[:10] for d in np.asarray(stack["time"].values, dtype="datetime64[D]")]
    medians, counts, n_scenes = [], [], []
    for season, (start, end) in seasons.items():
        mask = season_mask(stack["time"].values, start, end)
        if not mask.any():
            raise DataQualityError(
                f"season {season!r} ({start} to {end}, inclusive) contains no scene; the scene dates are "
                f"{dates}. Widen the window in [seasons] of the project file or add scenes for it."
            )
        sub = stack.isel(time=np.flatnonzero(mask))
        medians.append(nanmedian_time(sub))
        counts.append(sub.notnull().all("band").sum("time").astype(np.int16))
        n_scenes.append(int(mask.sum()))
    season_coords = {
        "season": list(seasons),
        "season_start": ("season", [w[0] for w in seasons.values()]),
        "season_end": ("season", [w[1] for w in seasons.values()]),
        "n_scenes": ("season", n_scenes),
    }
    refl = xr.concat(medians, dim="season").assign_coords(season_coords)
    count = xr.concat(counts, dim="season").assign_coords(season_coords)
    params = {"seasons": {k: list(v) for k, v in seasons.items()}}
    return xr.Dataset(
        {
            "reflectance": with_attrs(
                refl.transpose("season", "band", "y", "x"),
                "reflectance",
                long_name="Seasonal median surface reflectance",
                units="1",
                domain="optical",
                method="per-pixel median of the non-NaN observations of the scenes dated inside each "
                "month-day window (inclusive)",
                parameters=params,
            ),
            "valid_count": with_attrs(
                count.transpose("season", "y", "x"),
                "valid_count",
                long_name="Number of valid observations in the seasonal composite",
                units="1",
                domain="optical",
                method="count of scenes in the window with finite reflectance in every band",
                parameters=params,
            ),
        }
    )


# ---------------------------------------------------------------------------
# Reflectance plausibility (missing or doubled offset, unscaled DN)
# ---------------------------------------------------------------------------

# Plausibility thresholds: common practice, no source.  Dark objects (clear
# water, shadow) put the low percentile of blue surface reflectance at about
# 0 to 0.05; a forgotten -1000 DN offset (x 1e-4 scale) lifts it by ~0.1, a
# doubled one pushes it to ~-0.1 with many negatives; DN left unscaled are
# hundreds to thousands.
PLAUSIBILITY_LIMITS: Mapping[str, float] = MappingProxyType(
    {
        "dark_percentile": 1.0,
        "dark_blue_max": 0.08,
        "dark_blue_min": -0.03,
        "negative_fraction_max": 0.05,
        "unscaled_value": 1.5,
        "unscaled_fraction_max": 0.01,
    }
)


def _scene_metrics(scene: xr.DataArray, max_pixels: int, limits: Mapping[str, float]) -> dict[str, Any]:
    """Metrics of one ``(band, y, x)`` scene on a strided subsample (computes)."""
    step = max(1, int(np.ceil(np.sqrt(scene.sizes["y"] * scene.sizes["x"] / max_pixels))))
    sample = scene.isel(y=slice(None, None, step), x=slice(None, None, step))
    values = np.asarray(sample.values, dtype=np.float64)
    valid = values[np.isfinite(values)]
    has_blue = "blue" in [str(b) for b in sample["band"].values]
    blue = np.asarray(sample.sel(band="blue").values, dtype=np.float64) if has_blue else np.empty(0)
    blue = blue[np.isfinite(blue)]  # no blue band: the dark-object test is skipped (NaN)
    if valid.size == 0:
        return {"n_valid": 0, "diagnosis": "empty"}
    metrics = {
        "n_valid": int(valid.size),
        "negative_fraction": float(np.mean(valid < 0)),
        "dark_blue": float(np.percentile(blue, limits["dark_percentile"])) if blue.size else float("nan"),
        "unscaled_fraction": float(np.mean(valid > limits["unscaled_value"])),
        "median": float(np.median(valid)),
    }
    metrics["diagnosis"] = _diagnose(metrics, limits)
    return metrics


def _diagnose(m: Mapping[str, float], limits: Mapping[str, float]) -> str:
    if m["unscaled_fraction"] > limits["unscaled_fraction_max"]:
        return "unscaled"
    if m["negative_fraction"] > limits["negative_fraction_max"] or m["dark_blue"] < limits["dark_blue_min"]:
        return "offset_doubled"
    if m["dark_blue"] > limits["dark_blue_max"]:
        return "offset_missing"
    return "ok"


def _scene_label(scene: xr.DataArray, name: str | None) -> str:
    """A label for messages: the given name, else the scalar time coordinate, else 'scene'."""
    if name:
        return name
    if "time" in scene.coords and scene["time"].ndim == 0:
        return str(np.datetime64(scene["time"].values, "D"))
    return "scene"


def reflectance_plausibility(
    stack_or_scene: xr.DataArray,
    *,
    name: str | None = None,
    max_pixels: int = 1_000_000,
    limits: Mapping[str, float] | None = None,
) -> dict[str, dict[str, Any]]:
    """Per-scene checks for a missing or doubled additive offset and for unscaled DN.

    Computes (each scene is reduced to a few numbers on a strided subsample of
    at most ``max_pixels`` pixels).

    Parameters
    ----------
    stack_or_scene : xarray.DataArray
        ``("time", "band", "y", "x")`` stack or one ``("band", "y", "x")`` scene.
    name : str, optional
        Label of a single scene in the report (e.g. its file name).
    max_pixels : int
        Pixels per scene sampled on a regular stride.
    limits : mapping, optional
        Overrides for :data:`PLAUSIBILITY_LIMITS` (thresholds are common practice, no source).

    Returns
    -------
    dict
        Scene label (ISO date for a stack; ``name``, the date or ``"scene"``
        for one scene) to a dict with ``n_valid``, ``negative_fraction``
        (share of valid values < 0), ``dark_blue`` (1st percentile of blue),
        ``unscaled_fraction`` (share > 1.5), ``median`` and ``diagnosis`` in
        {"ok", "offset_missing", "offset_doubled", "unscaled", "empty"}.
    """
    lim = {**PLAUSIBILITY_LIMITS, **(limits or {})}
    if "time" not in stack_or_scene.dims:
        return {_scene_label(stack_or_scene, name): _scene_metrics(stack_or_scene, max_pixels, lim)}
    labels = [str(t)[:10] for t in np.asarray(stack_or_scene["time"].values, dtype="datetime64[D]")]
    return {
        label: _scene_metrics(stack_or_scene.isel(time=i), max_pixels, lim) for i, label in enumerate(labels)
    }


def _explain(label: str, m: Mapping[str, Any]) -> str:
    where = f"scene {label}"
    if m["diagnosis"] == "unscaled":
        return (
            f"{where}: {m['unscaled_fraction']:.0%} of valid values exceed 1.5 (median {m['median']:.4g}); "
            "surface reflectance lies in about [0, 1], so these look like unscaled digital numbers. "
            "Set scale = 0.0001 (and offset_dn) in that scene's [[optical]] table of the project file."
        )
    if m["diagnosis"] == "offset_missing":
        return (
            f"{where}: the darkest 1% of blue pixels sit at {m['dark_blue']:.3f}; dark objects should be "
            "near 0 to 0.05, so the additive offset seems not applied. Set offset_dn = -1000 in that "
            "scene's [[optical]] table of the project file."
        )
    if m["diagnosis"] == "offset_doubled":
        return (
            f"{where}: {m['negative_fraction']:.1%} of valid values are negative (dark blue level "
            f"{m['dark_blue']:.3f}); this looks like the offset applied twice, or to data that already "
            "carried it. Set offset_dn = 0 in that scene's [[optical]] table of the project file."
        )
    return f"{where}: no valid pixel; check the mask codes (mask_valid) and nodata of that scene."


def check_reflectance(
    stack_or_scene: xr.DataArray,
    *,
    name: str | None = None,
    max_pixels: int = 1_000_000,
    limits: Mapping[str, float] | None = None,
    allow_empty: bool = True,
) -> dict[str, dict[str, Any]]:
    """Raise :class:`DataQualityError` if any scene fails :func:`reflectance_plausibility`.

    Parameters
    ----------
    stack_or_scene : xarray.DataArray
        Stack or scene, as for :func:`reflectance_plausibility`.
    name : str, optional
        Label of a single scene in messages (e.g. its file name).
    max_pixels, limits
        Passed to :func:`reflectance_plausibility`.
    allow_empty : bool
        Accept scenes with no valid pixel (fully clouded).

    Returns
    -------
    dict
        The plausibility report, when every scene passes.
    """
    report = reflectance_plausibility(stack_or_scene, name=name, max_pixels=max_pixels, limits=limits)
    bad = {
        k: m
        for k, m in report.items()
        if m["diagnosis"] != "ok" and not (allow_empty and m["diagnosis"] == "empty")
    }
    if bad:
        lines = [_explain(k, m) for k, m in bad.items()]
        message = "implausible surface reflectance:\n" + "\n".join(lines)
        raise DataQualityError(f"{message}\nNote: {_OFFSET_HINT}.")
    return report
