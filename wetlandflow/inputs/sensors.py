"""Sensor descriptions as data: band names, centre wavelengths, scaling convention, plausible range.

A scene in the project file names its sensor (``sensor = "landsat89_oli_c2l2"``); the description then
supplies the defaults of that scene's ``bands``, ``scale``, ``offset_dn``, ``offset``, ``nodata`` and
``mask_valid`` (keys written in the scene table win), and the reflectance plausibility check reads the
expected range and whether a dark-object test applies from it.  A project may describe its own sensor
inline in a ``[sensors.<name>]`` table with the keys of :class:`Sensor`.

Reflectance is ``(DN + offset_dn) * scale + offset`` for every sensor.  The shipped descriptions follow
the agencies' product definitions:

* Sentinel-2 MSI Level-2A: reflectance = (DN + BOA_ADD_OFFSET) / QUANTIFICATION_VALUE with
  QUANTIFICATION_VALUE = 10000; BOA_ADD_OFFSET = -1000 for products of processing baseline 04.00 and
  later (from 25 January 2022), 0 before; DN 0 is no data (ESA, Sentinel-2 processing baseline 04.00
  note, 2022).  Centre wavelengths of Sentinel-2A from ESA's spectral response functions
  (S2-SRF, COPE-GSEG-EOPG-TN-15-0007), as tabulated in the Awesome Spectral Indices catalogue
  (Montero et al. 2023).
* Landsat 8-9 OLI and Landsat 4-7 TM/ETM+ Collection 2 Level-2 surface reflectance: reflectance =
  DN x 0.0000275 - 0.2, fill 0, valid DN range 7273-43636 (USGS, "How do I use a scale factor with
  Landsat Level-2 science products?"; USGS LSDS-1619 Landsat 8-9 and LSDS-1618 Landsat 4-7 Collection 2
  Level 2 Science Product Guides).  Centre wavelengths as tabulated in the same catalogue.
* Generic RGB and RGB+NIR (aerial or commercial products): nominal centre wavelengths (common practice,
  no source), no additive offset and no dark-object test: such data are often not atmospherically
  corrected, so only the range [0, 1] after scaling is checked.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from types import MappingProxyType
from typing import Any

from ..errors import ProjectFileError

# The portable band names a scene may use (Sentinel-2's ten 10/20 m bands plus the coastal/aerosol band).
BAND_NAMES = ("coastal", "blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1", "swir2")

# Scene keys a sensor description provides defaults for.
SCENE_DEFAULT_KEYS = ("bands", "scale", "offset_dn", "offset", "nodata", "mask_valid")


@dataclass(frozen=True)
class Sensor:
    """One optical sensor's product convention.

    Parameters
    ----------
    name : str
        Name used in the project file (``sensor = "..."``).
    description : str
        One line for reports.
    bands : tuple of str
        Portable band names (:data:`BAND_NAMES`) in the product's usual file order.
    native : tuple of str
        The agency's band names, same order (``B04``, ``SR_B4``); empty for generic sensors.
    centre_nm : tuple of float
        Centre wavelength of each band (nm), same order.
    scale, offset_dn, offset : float
        reflectance = (DN + offset_dn) * scale + offset.
    nodata : float
        DN value of no data (fill).
    valid_range : (float, float)
        Plausible range of the scaled values; the plausibility check refuses scenes with more than 1 % of
        values outside it.
    dark_object_check : bool
        Atmospherically corrected surface reflectance: the darkest blue pixels (water, shadow) must sit near
        0, which catches a missing or doubled offset.
    mask_valid : tuple of int
        Quality-mask codes kept (the scene-classification codes of the product), when a mask is given.
    reference : str
        The published definition.
    """

    name: str
    description: str = ""
    bands: tuple[str, ...] = ()
    native: tuple[str, ...] = ()
    centre_nm: tuple[float, ...] = ()
    scale: float = 1.0
    offset_dn: float = 0.0
    offset: float = 0.0
    nodata: float = 0.0
    valid_range: tuple[float, float] = (0.0, 1.0)
    dark_object_check: bool = False
    mask_valid: tuple[int, ...] = ()
    reference: str = ""

    def scene_defaults(self) -> dict[str, Any]:
        """The scene keys this sensor provides, as they would be written in the project file."""
        out: dict[str, Any] = {
            "bands": list(self.bands),
            "scale": self.scale,
            "offset_dn": self.offset_dn,
            "offset": self.offset,
            "nodata": self.nodata,
        }
        if self.mask_valid:
            out["mask_valid"] = list(self.mask_valid)
        return out

    def centre(self, band: str) -> float | None:
        """Centre wavelength of a portable band name, or None when the sensor lacks it."""
        return dict(zip(self.bands, self.centre_nm, strict=False)).get(band)


_S2_BANDS = ("blue", "green", "red", "re1", "re2", "re3", "nir", "nir_narrow", "swir1", "swir2")
_S2_NATIVE = ("B02", "B03", "B04", "B05", "B06", "B07", "B08", "B8A", "B11", "B12")
_S2_CENTRES = (492.4, 559.8, 664.6, 704.1, 740.5, 782.8, 832.8, 864.7, 1613.7, 2202.4)
_S2_REF = (
    "ESA (2022) Sentinel-2 processing baseline 04.00: L2A_SR = (DN + BOA_ADD_OFFSET) / "
    "QUANTIFICATION_VALUE, QUANTIFICATION_VALUE 10000, DN 0 no data; S2A centres from ESA S2-SRF "
    "(COPE-GSEG-EOPG-TN-15-0007) via Montero et al. (2023) Awesome Spectral Indices"
)
_LANDSAT_REF = (
    "USGS, How do I use a scale factor with Landsat Level-2 science products? (SR: DN x "
    "0.0000275 - 0.2, fill 0, valid 7273-43636); USGS {guide}"
)
_L2_RANGE = (7273 * 0.0000275 - 0.2, 43636 * 0.0000275 - 0.2)  # USGS valid DN range, scaled: about 0.0 to 1.0

SENSORS: MappingProxyType[str, Sensor] = MappingProxyType(
    {
        s.name: s
        for s in (
            Sensor(
                "sentinel2_l2a",
                "Sentinel-2 MSI Level-2A, processing baseline 04.00 or later (from 2022-01-25)",
                _S2_BANDS,
                _S2_NATIVE,
                _S2_CENTRES,
                scale=0.0001,
                offset_dn=-1000.0,
                nodata=0.0,
                valid_range=(-0.1, 1.2),
                dark_object_check=True,
                mask_valid=(4, 5, 6, 7),
                reference=_S2_REF,
            ),
            Sensor(
                "sentinel2_l2a_pre2022",
                "Sentinel-2 MSI Level-2A, processing baseline before 04.00 (no offset)",
                _S2_BANDS,
                _S2_NATIVE,
                _S2_CENTRES,
                scale=0.0001,
                offset_dn=0.0,
                nodata=0.0,
                valid_range=(0.0, 1.2),
                dark_object_check=True,
                mask_valid=(4, 5, 6, 7),
                reference=_S2_REF,
            ),
            Sensor(
                "landsat89_oli_c2l2",
                "Landsat 8/9 OLI Collection 2 Level-2 surface reflectance (SR_B1-SR_B7)",
                ("coastal", "blue", "green", "red", "nir", "swir1", "swir2"),
                ("SR_B1", "SR_B2", "SR_B3", "SR_B4", "SR_B5", "SR_B6", "SR_B7"),
                (440.0, 480.0, 560.0, 655.0, 865.0, 1610.0, 2200.0),
                scale=0.0000275,
                offset=-0.2,
                nodata=0.0,
                valid_range=_L2_RANGE,
                dark_object_check=True,
                reference=_LANDSAT_REF.format(
                    guide="LSDS-1619 Landsat 8-9 Collection 2 Level 2 Science Product Guide"
                ),
            ),
            Sensor(
                "landsat47_tm_etm_c2l2",
                "Landsat 4-7 TM/ETM+ Collection 2 Level-2 surface reflectance (SR_B1-SR_B5, SR_B7)",
                ("blue", "green", "red", "nir", "swir1", "swir2"),
                ("SR_B1", "SR_B2", "SR_B3", "SR_B4", "SR_B5", "SR_B7"),
                (485.0, 560.0, 660.0, 835.0, 1650.0, 2220.0),
                scale=0.0000275,
                offset=-0.2,
                nodata=0.0,
                valid_range=_L2_RANGE,
                dark_object_check=True,
                reference=_LANDSAT_REF.format(
                    guide="LSDS-1618 Landsat 4-7 Collection 2 Level 2 Science Product Guide"
                ),
            ),
            Sensor(
                "rgbn",
                "generic 4-band red, green, blue, near-infrared (aerial or commercial); set scale so that "
                "values fall in [0, 1] (e.g. 1/255 for 8-bit data)",
                ("red", "green", "blue", "nir"),
                (),
                (665.0, 560.0, 490.0, 842.0),
                scale=1.0,
                nodata=0.0,
                valid_range=(0.0, 1.0),
                reference="nominal band centres (common practice, no source)",
            ),
            Sensor(
                "rgb",
                "generic 3-band red, green, blue; set scale so that values fall in [0, 1]",
                ("red", "green", "blue"),
                (),
                (665.0, 560.0, 490.0),
                scale=1.0,
                nodata=0.0,
                valid_range=(0.0, 1.0),
                reference="nominal band centres (common practice, no source)",
            ),
        )
    }
)


def sensor_from_table(name: str, table: Any, *, key: str) -> Sensor:
    """A :class:`Sensor` from an inline ``[sensors.<name>]`` table, with clear messages."""
    if not isinstance(table, dict):
        raise ProjectFileError(f"expected a table describing the sensor, got {table!r}", key=key)
    fields = {f.name for f in dataclasses.fields(Sensor)} - {"name"}
    unknown = sorted(set(table) - fields)
    if unknown:
        raise ProjectFileError(
            f"unknown key {unknown[0]!r}; valid keys here are: {', '.join(sorted(fields))}",
            key=f"{key}.{unknown[0]}",
        )
    if "bands" not in table:
        raise ProjectFileError(
            'a sensor needs its band list, e.g. bands = ["red", "green", "blue", "nir"]', key=f"{key}.bands"
        )
    kw = dict(table)
    for k in ("bands", "native", "centre_nm", "mask_valid", "valid_range"):
        if k in kw:
            if not isinstance(kw[k], list):
                raise ProjectFileError(f"expected a list, got {kw[k]!r}", key=f"{key}.{k}")
            kw[k] = tuple(kw[k])
    bad = [b for b in kw["bands"] if b not in BAND_NAMES]
    if bad:
        raise ProjectFileError(
            f"unknown band name(s) {bad}; use the portable names {', '.join(BAND_NAMES)}", key=f"{key}.bands"
        )
    if "valid_range" in kw and (len(kw["valid_range"]) != 2 or kw["valid_range"][0] >= kw["valid_range"][1]):
        raise ProjectFileError(
            f"valid_range is [low, high] with low < high, got {list(kw['valid_range'])}",
            key=f"{key}.valid_range",
        )
    for k in ("scale", "offset_dn", "offset", "nodata"):
        if k in kw and (isinstance(kw[k], bool) or not isinstance(kw[k], int | float)):
            raise ProjectFileError(f"expected a number, got {kw[k]!r}", key=f"{key}.{k}")
    return Sensor(name=name, **kw)


def resolve_sensor(name: str, inline: dict[str, Sensor], *, key: str) -> Sensor:
    """The sensor called ``name``: an inline description first, then a shipped one."""
    if name in inline:
        return inline[name]
    if name in SENSORS:
        return SENSORS[name]
    raise ProjectFileError(
        f"unknown sensor {name!r}; shipped sensors: {', '.join(sorted(SENSORS))}"
        + (f"; described in this file: {', '.join(sorted(inline))}" if inline else "")
        + ". Name one of these, or describe yours in a [sensors."
        + name
        + "] table (docs/project-file.md)",
        key=key,
    )


def sensor_table() -> Any:
    """The shipped sensors as a DataFrame (for docs and ``check``)."""
    import pandas as pd

    return pd.DataFrame(
        [
            {
                "sensor": s.name,
                "bands": ", ".join(s.bands),
                "scale": s.scale,
                "offset_dn": s.offset_dn,
                "offset": s.offset,
                "valid_range": list(s.valid_range),
                "description": s.description,
            }
            for s in SENSORS.values()
        ]
    )
