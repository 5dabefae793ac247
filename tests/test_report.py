"""The methods report: regenerated from a run folder alone, every section, sources and numbers as recorded."""

from __future__ import annotations

import base64
import html
import json
import re
import shutil
import unicodedata
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from conftest import project_variant

from wetlandflow import CAUTION
from wetlandflow.errors import InputFileError
from wetlandflow.report.appendix import write_report
from wetlandflow.report.figures import read_preview
from wetlandflow.report.references import BIBLIOGRAPHY, Citations, match
from wetlandflow.report.run_folder import RunFolder
from wetlandflow.report.text import NO_SAMPLE, SECTIONS


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    """A tiny demo run (200 x 200 px) with explanations and an assessed sample; its inputs then deleted."""
    from wetlandflow.accuracy.assessment import assess, class_codes, design_sample, label_from_reference
    from wetlandflow.demo.landscape import load_truth, make_demo
    from wetlandflow.inputs.project import load_project
    from wetlandflow.pipeline.run import run_project

    folder = tmp_path_factory.mktemp("report_demo")
    pf = project_variant(make_demo(folder, size=200, seed=1), "tiny", **{
        "model.n_estimators": 30, "validation.n_folds": 3, "validation.block_size_m": 200.0,
        "output.explain_rows": 300, "output.chunk_size": 128, "project.output_dir": "runs/tiny"})
    run_project(pf, progress=False)
    project = load_project(pf)
    sample = design_sample(project, overwrite=True, min_per_class=20, exclude_buffer_m=20.0, target_se=0.03)
    assess(project, label_from_reference(sample, load_truth(folder), class_codes(project),
                                         sample.with_name("sample_labelled.gpkg")))
    # Move the run folder away and delete every input: the report must need nothing but the run folder.
    moved = tmp_path_factory.mktemp("moved") / "tiny"
    shutil.move(str(project.run_dir), moved)
    shutil.rmtree(folder)
    return moved


@pytest.fixture(scope="module")
def report(run_dir) -> dict[str, str]:
    paths = write_report(run_dir)
    return {"md": paths["markdown"].read_text(), "html": paths["html"].read_text(),
            "figures": sorted(p.name for p in paths["figures"].iterdir())}


def section(md: str, title: str) -> str:
    """The Markdown text of one section (up to the next level-2 heading)."""
    start = md.index(f"## {title}\n")
    end = md.find("\n## ", start + 3)
    return md[start:end if end > 0 else None]


def fold(text: str) -> str:
    return unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode().lower()


def test_regenerates_from_run_folder_alone(run_dir, report):
    manifest = json.loads((run_dir / "manifest.json").read_text())
    assert not Path(manifest["project"]["dem"]["path"]).exists()  # the inputs are really gone
    assert not Path(manifest["project"]["plots"]["path"]).exists()
    assert (run_dir / "report" / "index.html").is_file() and (run_dir / "report" / "methods.md").is_file()
    assert not list((run_dir / "report").glob("*.partial")), "no temporary file left behind"


def test_every_section_present_in_order(report):
    md_positions = [report["md"].index(f"\n## {t}\n") for t in SECTIONS]
    assert md_positions == sorted(md_positions)
    for title in SECTIONS:
        assert f"<h2>{html.escape(title)}</h2>" in report["html"]


def test_caution_is_prominent(report):
    assert report["md"].index(CAUTION) < report["md"].index("## Summary")
    assert f'<div class="caution">Caution. {html.escape(CAUTION)}</div>' in report["html"]


def test_every_feature_reference_in_the_cube_is_listed(run_dir, report):
    """Read the sources from the Zarr store's own attrs; each author-year must head an entry of the list."""
    import xarray as xr

    cube = xr.open_zarr(run_dir / "features.zarr")
    refs = section(report["md"], "References")
    entries = [fold(line[2:]) for line in refs.splitlines() if line.startswith("- ")]
    checked = 0
    for name, var in cube.data_vars.items():
        text = var.attrs.get("reference", "")
        if not text:
            continue
        surname = re.match(r"[^A-Za-z]*(?:form usually attributed to )?([A-Z][\w'\-]+)", text).group(1)
        year = re.search(r"\b(1[89]\d\d|20\d\d)\b", text).group(1)
        hits = [e for e in entries if e.startswith(fold(surname)) and f"({year})" in e]
        assert hits, f"{name}: {surname} {year} missing from the references"
        assert name in hits[0], f"{name} is not named among the uses of {surname} {year}"
        checked += 1
    assert checked >= 10
    # Methods read from the features' parameters are cited too (TWI routed by multiple flow directions).
    params = json.loads(cube["twi"].attrs["parameters"])
    assert params["method"] == "mfd"
    assert any(e.startswith("freeman") and "twi" in e for e in entries)


def test_step_methods_are_cited(report):
    refs = fold(section(report["md"], "References"))
    for surname, year in (("olofsson", 2014), ("meyer", 2021), ("lundberg", 2020), ("roberts", 2017),
                          ("chen", 2016), ("pontius", 2011)):
        assert f"\n- {surname}" in refs and f"({year})" in refs


def test_cv_numbers_equal_metrics_json(run_dir, report):
    m = json.loads((run_dir / "validation" / "metrics.json").read_text())
    text = section(report["md"], "Cross-validated accuracy (for model choice)")
    assert f"overall accuracy of {m['overall_accuracy']:.3f}" in text
    assert f"{m['n']:,} training pixels" in text
    assert f"quantity disagreement {m['quantity_disagreement']:.3f}" in text
    for row in m["per_class"]:
        line = next(r for r in text.splitlines() if r.startswith(f"| {row['class']} |"))
        assert f"| {row['users']:.3f} | {row['producers']:.3f} | {row['f1']:.3f} |" in line
    assert "model choice" in text.lower() or "choose models" in text
    assert "not the accuracy of the inventory" in text


def test_area_and_accuracy_numbers_equal_the_tables(run_dir, report):
    areas = pd.read_csv(run_dir / "areas.csv")
    maps = section(report["md"], "Maps and mapped areas")
    for _, r in areas.iterrows():
        assert f"| {r['class']} | {r['mapped_area_ha']:,.1f} |" in maps
    s = json.loads((run_dir / "accuracy" / "summary.json").read_text())
    inv = section(report["md"], "Inventory accuracy and error-adjusted areas (probability sample)")
    assert f"overall accuracy of {s['overall_accuracy']:.3f} (standard error {s['overall_se']:.3f}" in inv
    table = pd.read_csv(run_dir / "accuracy" / "area_table.csv")
    for _, r in table.iterrows():
        assert (f"| {r['class']} | {r['mapped_area_ha']:,.1f} | {r['estimated_area_ha']:,.1f} | "
                f"{r['ci_low_ha']:,.1f} to {r['ci_high_ha']:,.1f} |") in inv
    share = json.loads((run_dir / "manifest.json").read_text())["steps"]["mapping"]["share_outside_applicability"]
    assert f"{100 * share:.1f} % of the mapped pixels lie outside" in section(report["md"], "Area of applicability")


def test_html_is_self_contained(report):
    page = report["html"]
    text = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", page)
    assert not re.search(r"https?:|ftp:|//[a-z]", text, re.I)
    assert "<link" not in page and "<script" not in page and "@import" not in page and "url(" not in page
    srcs = re.findall(r'src="([^"]*)"', page)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert all(base64.b64decode(s.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n" for s in srcs)
    assert all(h.startswith("#") for h in re.findall(r'href="([^"]*)"', page))
    # The Markdown shows the same figures, as files beside it.
    linked = re.findall(r"\]\(figures/([^)]+)\)", report["md"])
    assert sorted(linked) == report["figures"] and len(srcs) == len(linked)


def test_reproduce_command_and_versions(run_dir, report):
    manifest = json.loads((run_dir / "manifest.json").read_text())
    text = section(report["md"], "Reproducing this run")
    assert f"wetlandflow run {manifest['project_file']}" in text
    versions = section(report["md"], "Software versions")
    for lib, v in manifest["versions"].items():
        assert f"| {lib} | {v} |" in versions


def test_without_a_probability_sample_the_report_says_so(run_dir, tmp_path):
    bare = tmp_path / "bare"
    shutil.copytree(run_dir, bare, ignore=shutil.ignore_patterns("report", "accuracy", "validation_sample"))
    md = write_report(bare)["markdown"].read_text()
    inv = section(md, "Inventory accuracy and error-adjusted areas (probability sample)")
    assert NO_SAMPLE in inv and NO_SAMPLE in section(md, "Summary")
    assert "wetlandflow sample PROJECT.toml" in inv and "wetlandflow assess PROJECT.toml FILE" in inv
    assert "error-adjusted ha" not in md
    assert "olofsson" not in fold(section(md, "References"))  # no sample assessed: its estimator is not cited


def _plain_tif(path: Path, values: np.ndarray) -> Path:
    import rasterio
    from rasterio.transform import from_origin

    with rasterio.open(path, "w", driver="GTiff", width=values.shape[1], height=values.shape[0], count=1,
                       dtype=values.dtype, crs="EPSG:32633", transform=from_origin(0, 7000, 10, 10), tiled=True,
                       blockxsize=256, blockysize=256) as dst:
        dst.write(values[None])
    return path


def test_preview_reads_an_overview_not_the_full_raster(tmp_path):
    """A COG with overviews: the preview has the shape of an overview level, as GDAL reports it."""
    import rasterio

    from wetlandflow.mapping.predict import build_cog

    codes = np.repeat(np.arange(1, 7, dtype=np.uint8), 100)[None, :].repeat(700, axis=0)  # 700 x 600
    cog = build_cog(_plain_tif(tmp_path / "plain.tif", codes), tmp_path / "cog.tif", overview_resampling="mode")
    with rasterio.open(cog) as src:
        factors = src.overviews(1)
    with rasterio.open(cog, overview_level=0) as ov:
        level0 = ov.read(1)
    values, extent, factor = read_preview(cog, max_side=400)
    assert factors and factor == pytest.approx(factors[0], rel=0.01)
    assert values.shape == level0.shape and max(values.shape) <= 400
    assert np.array_equal(values, level0)
    assert extent == (0.0, 6000.0, 0.0, 7000.0)


def test_preview_refuses_a_large_raster_without_overviews(tmp_path):
    path = _plain_tif(tmp_path / "plain.tif", np.ones((700, 700), np.uint8))
    with pytest.raises(InputFileError, match="no overviews"):
        read_preview(path, max_side=512)


def test_missing_manifest_is_a_clear_error(tmp_path):
    with pytest.raises(InputFileError, match="manifest.json"):
        RunFolder(tmp_path)


@pytest.mark.reference
def test_bibliography_entries_match_the_published_citations():
    """Citations as printed by the journals (authors, year, title, volume, pages):

    Olofsson, Foody, Herold, Stehman, Woodcock, Wulder (2014) Good practices for estimating area and assessing
    accuracy of land change, Remote Sensing of Environment 148, 42-57; Meyer & Pebesma (2021) Predicting into
    unknown space? Estimating the area of applicability of spatial prediction models, Methods in Ecology and
    Evolution 12(9), 1620-1633; Otsu (1979) A threshold selection method from gray-level histograms, IEEE
    Transactions on Systems, Man, and Cybernetics SMC-9(1), 62-66.
    """
    assert BIBLIOGRAPHY["olofsson2014"].citation() == (
        "Olofsson, P., Foody, G. M., Herold, M., Stehman, S. V., Woodcock, C. E., Wulder, M. A. (2014). Good "
        "practices for estimating area and assessing accuracy of land change. Remote Sensing of Environment 148, "
        "42-57. doi:10.1016/j.rse.2014.02.015")
    assert BIBLIOGRAPHY["meyer2021"].citation() == (
        "Meyer, H., Pebesma, E. (2021). Predicting into unknown space? Estimating the area of applicability of "
        "spatial prediction models. Methods in Ecology and Evolution 12(9), 1620-1633. "
        "doi:10.1111/2041-210X.13650")
    assert BIBLIOGRAPHY["otsu1979"].short() == "Otsu (1979)"
    assert BIBLIOGRAPHY["meyer2021"].short(parenthetical=True) == "Meyer & Pebesma 2021"
    assert BIBLIOGRAPHY["olofsson2014"].short() == "Olofsson et al. (2014)"


def test_matching_recorded_reference_strings():
    two = "Wilson & Sader (2002) Detection of forest harvest type; after Gao (1996) NDWI"
    assert {r.key for r in match(two)} == {"wilson2002", "gao1996"}
    assert [r.key for r in match("Renno, C. D. et al. (2008) HAND")] == ["renno2008"]  # accent-insensitive
    c = Citations()
    c.add_text("An unlisted source (1999) Some title", "feature a")
    c.add_text("An unlisted source (1999) Some title", "feature b")
    c.add_method("area_of_applicability", "aoa")
    entries = c.entries()
    assert [e.used_for for e in entries] == [["feature a", "feature b"], ["aoa"]]
    with pytest.raises(KeyError, match="known"):
        c.add_method("no_such_method", "x")


# -- print-ready outputs: the PDF appendix, the summary sheet, map pages with their cartographic elements ----------
def _pdf_text(path: Path) -> list[str]:
    import pypdfium2 as pdfium

    doc = pdfium.PdfDocument(str(path))
    try:
        return [doc[i].get_textpage().get_text_range() for i in range(len(doc))]
    finally:
        doc.close()


def _pdf_images(path: Path) -> int:
    import pypdfium2 as pdfium
    import pypdfium2.raw as pdfium_c

    doc = pdfium.PdfDocument(str(path))
    try:
        return sum(1 for i in range(len(doc)) for _ in doc[i].get_objects(filter=(pdfium_c.FPDF_PAGEOBJ_IMAGE,)))
    finally:
        doc.close()


def test_pdf_appendix_renders_with_text_and_figures(run_dir, report):
    """Every page renders to PNG; the text holds the caution, every section title and the totals; figures are
    embedded images."""
    import pypdfium2 as pdfium

    pdf = run_dir / "report" / "methods.pdf"
    doc = pdfium.PdfDocument(str(pdf))
    try:
        assert len(doc) >= 3
        for i in range(3):  # the first pages render to non-blank images
            image = np.asarray(doc[i].render(scale=0.5).to_pil().convert("L"))
            assert image.shape[0] > 300 and image.min() < 100 and image.max() > 200
    finally:
        doc.close()
    text = fold(" ".join(_pdf_text(pdf)).replace("\r", " ").replace("\n", " "))
    assert fold(CAUTION)[:60] in text
    for title in SECTIONS:
        assert fold(title) in text, title
    assert "total wetland area" in text
    assert _pdf_images(pdf) >= len([f for f in report["figures"] if f.endswith(".png")]) - 1


def test_summary_leads_with_totals_and_fits_one_page(run_dir, report):
    summary = section(report["md"], "Summary")
    first = summary.split("\n\n")[1]
    assert first.startswith("Total wetland area"), first
    grouped = pd.read_csv(run_dir / "accuracy" / "grouped_area_table.csv").set_index("class")
    w = grouped.loc["wetland"]
    for v in (w["estimated_area_ha"], w["ci_low_ha"], w["ci_high_ha"]):
        assert f"{v:,.1f}" in first
    pages = _pdf_text(run_dir / "report" / "summary.pdf")
    assert len(pages) == 1
    assert "Total wetland area" in pages[0] and "Caution" in pages[0]
    assert _pdf_images(run_dir / "report" / "summary.pdf") == 1  # the class map


def test_class_definitions_and_full_labels_in_report(report):
    text = section(report["md"], "Classes mapped")
    for label in ("Shallow open water", "Marsh", "Swamp", "Fen", "Bog"):
        assert f"| {label} |" in text
    assert "Canadian Wetland Classification System (National Wetlands Working Group 1997)" in text
    refs = section(report["md"], "References")  # cited in the bibliography, not only inline
    entry = next(line for line in refs.splitlines() if "National Wetlands Working Group (1997)" in line)
    assert "The Canadian Wetland Classification System" in entry and "ISBN 0-662-25857-6" in entry


def test_project_definitions_replace_the_defaults_in_table_and_legend(run_dir, tmp_path):
    """``[classes] definitions`` as recorded in the manifest: the report's table and the map legend use
    them."""
    from wetlandflow.report.figures import _labels

    copy = tmp_path / "defs"
    shutil.copytree(run_dir, copy)
    manifest = json.loads((copy / "manifest.json").read_text())
    manifest["project"]["classes"]["definitions"] = {
        "fen": "Sedge peatland fed by seepage from the valley sides.",
        "bog": {"label": "Raised bog", "definition": "Rain-fed Sphagnum peatland."}}
    (copy / "manifest.json").write_text(json.dumps(manifest))
    run = RunFolder(copy)
    assert _labels(run)["bog"] == "Raised bog" and _labels(run)["fen"] == "Fen"
    text = section(write_report(copy)["markdown"].read_text(), "Classes mapped")
    assert "| Raised bog | bog | Rain-fed Sphagnum peatland. |" in text
    assert "| Fen | fen | Sedge peatland fed by seepage from the valley sides. |" in text
    assert "project's own" in text and "Fen, Raised bog" in text
    assert "| Marsh | marsh |" in text  # no definition given: the default stays


def test_pdf_columns_get_room_by_their_longest_text():
    from reportlab.pdfbase.pdfmetrics import stringWidth

    from wetlandflow.report.pdf import column_widths

    frame = pd.DataFrame({"class": ["Marsh", "Shallow open water"], "code name": ["marsh", "open_water"],
                          "definition": ["word " * 60, "A short one."]})
    widths = column_widths(frame, 450.0)
    assert sum(widths) == pytest.approx(450.0)
    assert widths == pytest.approx([450.0 * w / 88 for w in (18, 10, 60)])  # 300 characters count as 60
    # a date never breaks: its column is at least the date's width plus the cell padding
    dates = pd.DataFrame({"date": ["2024-04-22"], "file": ["optical/scene_20240422_scl.tif" * 3]})
    date_w = column_widths(dates, 450.0)[0]
    assert date_w >= stringWidth("2024-04-22", "Helvetica", 6.8) + 12
    assert sum(column_widths(dates, 450.0)) == pytest.approx(450.0)


@pytest.mark.reference
def test_map_page_is_a4_and_its_printed_scale_is_true(run_dir, report):
    """The standalone map page is A4 landscape and its stated 1:N holds on paper.

    Sources: ISO 216 (A4 = 210 mm x 297 mm); the scale is measured on the PDF itself, as the distance on the
    page between two easting tick labels whose ground distance is known, read with PDFium (pypdfium2).
    """
    import pypdfium2 as pdfium

    pdf = run_dir / "report" / "maps" / "class_map.pdf"
    doc = pdfium.PdfDocument(str(pdf))
    try:
        page = doc[0]
        w_pt, h_pt = page.get_size()
        assert abs(w_pt / 72 * 25.4 - 297) < 0.5 and abs(h_pt / 72 * 25.4 - 210) < 0.5
        tp = page.get_textpage()
        text = tp.get_text_range()
        stated = int(re.search(r"Scale 1:([\d,]+) when printed", text).group(1).replace(",", ""))
        ticks = {}
        for m in re.finditer(r"\b(\d{6})\b", text):  # easting labels of a UTM grid: six digits
            value = int(m.group(1))
            left, _, right, _ = tp.get_charbox(m.start())
            ticks.setdefault(value, (left + tp.get_charbox(m.end() - 1)[2]) / 2)
    finally:
        doc.close()
    eastings = sorted(v for v in ticks if v < 1_000_000)
    a, b = eastings[0], eastings[-1]
    paper_m = abs(ticks[b] - ticks[a]) / 72 * 0.0254
    measured = (b - a) / paper_m
    assert abs(measured - stated) / stated < 0.01, (measured, stated)


@pytest.mark.reference
def test_north_arrow_turns_by_the_meridian_convergence():
    """True north against grid north on UTM zone 33N.

    References: pyproj's ``Proj.get_factors(...).meridian_convergence`` (PROJ), with the opposite sign
    convention; and the first-order transverse Mercator convergence, gamma = (lon - lon0) sin(lat), of
    Snyder, J. P. (1987). Map Projections: A Working Manual. USGS Professional Paper 1395.
    """
    import math

    from pyproj import Proj, Transformer

    from wetlandflow.report.cartography import true_north_angle

    to_utm = Transformer.from_crs(4326, 32633, always_xy=True)
    for lon, lat in [(17.0, 60.0), (13.0, 45.0), (15.0, 50.0), (17.0, -30.0)]:
        x, y = to_utm.transform(lon, lat)
        angle = true_north_angle(32633, x, y)
        assert angle == pytest.approx(-Proj(32633).get_factors(lon, lat).meridian_convergence, abs=1e-3)
        assert angle == pytest.approx(-(lon - 15.0) * math.sin(math.radians(lat)), abs=0.01)
