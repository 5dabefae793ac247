"""The committed demo data stays what the generator makes."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import rasterio

from wetlandflow.demo.landscape import make_demo

COMMITTED = Path(__file__).resolve().parent.parent / "demo_data" / "orlenmere_small"


def test_committed_demo_matches_a_fresh_generation(tmp_path):
    """Same headers, tags and band names; pixel values equal up to float rounding.

    numpy picks its vectorised log, power and FFT kernels by CPU, and their results may differ in the last
    places from one machine to the next (seen on the SAR backscatter: relative differences up to 1.3e-6),
    so the files are compared by content, to a relative 1e-5, not byte by byte.
    """
    make_demo(tmp_path, size=160, seed=3)
    tifs = sorted(p.relative_to(COMMITTED) for p in COMMITTED.rglob("*.tif"))
    assert len(tifs) >= 1 + 1 + 5 * 2 + 12  # dem, truth, optical + masks, SAR dates
    for rel in tifs:
        with rasterio.open(COMMITTED / rel) as old, rasterio.open(tmp_path / rel) as new:
            assert new.profile == old.profile, rel
            assert new.tags() == old.tags() and new.descriptions == old.descriptions, rel
            a, b = old.read(), new.read()
        if a.dtype.kind == "f":
            np.testing.assert_allclose(b, a, rtol=1e-5, atol=0, err_msg=str(rel))
        else:
            assert np.array_equal(a, b), rel
    assert (tmp_path / "project.toml").read_text() == (COMMITTED / "project.toml").read_text()
