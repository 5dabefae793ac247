"""The committed demo data stays what the generator makes."""

from __future__ import annotations

from pathlib import Path

from wetlandflow.demo import make_demo

COMMITTED = Path(__file__).resolve().parent.parent / "demo_data" / "orlenmere_small"


def test_committed_demo_is_byte_identical_to_a_fresh_generation(tmp_path):
    make_demo(tmp_path, size=160, seed=3)
    tifs = sorted(p.relative_to(COMMITTED) for p in COMMITTED.rglob("*.tif"))
    assert len(tifs) >= 1 + 1 + 5 * 2 + 12  # dem, truth, optical + masks, SAR dates
    for rel in tifs:
        assert (tmp_path / rel).read_bytes() == (COMMITTED / rel).read_bytes(), rel
    assert (tmp_path / "project.toml").read_text() == (COMMITTED / "project.toml").read_text()
