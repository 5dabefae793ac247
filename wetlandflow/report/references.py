"""The bibliography of the published methods a run can use, keyed by method.

A run's report cites only what the run did: the sources recorded in the
feature cube's ``reference`` attrs, matched to full entries here, plus the
methods of the steps that ran (:data:`METHODS`).  :func:`cite_features` and
:func:`collect` turn those into a de-duplicated, sorted reference list, each
entry with what it was used for.

Every entry carries a stable identifier (``doi``, or ``identifier`` for an
ISBN, a report number or a bibliographic code when the work has no DOI) and
``checked``, one of :data:`CHECKED_STATES`:

``"verified"``
    authors, year, title and venue read in the work's own record: the
    publisher's page, the DOI or indexing record, a library catalogue, or the
    work's first page; any remaining detail agrees across published reference
    lists.
``"secondary"``
    the citation (with its identifier) agrees across several independent
    published reference lists, but no record of the work itself was read.
``"not verified"``
    neither; the report says so next to the entry.
"""

from __future__ import annotations

import re
import unicodedata
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field

CHECKED_STATES = ("verified", "secondary", "not verified")

# DOI syntax, DOI Handbook section 2.2: prefix "10." + registrant code (dot-separated digits), "/", suffix of
# printable characters.
DOI_PATTERN = re.compile(r"10\.\d{4,9}(?:\.\d+)*/\S+")


@dataclass(frozen=True, slots=True)
class Reference:
    """One published source: authors as printed, year, title, where it appeared, and its identifier."""

    key: str
    authors: str
    year: int
    title: str
    source: str
    checked: str = "not verified"
    doi: str = ""
    identifier: str = ""

    @property
    def first_author(self) -> str:
        """Surname of the first author (the text before the first comma)."""
        return self.authors.split(",")[0].strip()

    def stable_id(self) -> str:
        """``doi:<DOI>``, else the other stable identifier (ISBN, report number), else ''.

        The ``doi:`` form, not a resolver link, keeps the report free of web addresses (its HTML is
        self-contained and works offline).
        """
        return f"doi:{self.doi}" if self.doi else self.identifier

    def citation(self) -> str:
        """The full citation: authors (year). Title. Source. Identifier."""
        title = self.title if self.title.endswith(("?", ".", "!")) else f"{self.title}."
        text = f"{self.authors} ({self.year}). {title} {self.source}."
        return f"{text} {self.stable_id()}" if self.stable_id() else text

    def surnames(self) -> list[str]:
        """Authors' surnames in order (the comma-separated parts that are not initials)."""
        return [t for t in self.authors.split(", ") if not _INITIALS.fullmatch(t)]

    def short(self, *, parenthetical: bool = False) -> str:
        """The in-text form: ``Surname (year)``, ``A & B (year)`` or ``Surname et al. (year)``.

        ``parenthetical=True`` drops the brackets around the year (``Surname et al. 2014``), for use inside
        a bracketed citation.
        """
        names = self.surnames()
        who = names[0] if len(names) == 1 else f"{names[0]} & {names[1]}" if len(names) == 2 else \
            f"{names[0]} et al."
        return f"{who} {self.year}" if parenthetical else f"{who} ({self.year})"


_INITIALS = re.compile(r"(?:[A-Z]\.(?:-[A-Z]\.)?\s?)+")


def _ref(key: str, authors: str, year: int, title: str, source: str, checked: str, *, doi: str = "",
         identifier: str = "") -> Reference:
    return Reference(key, authors, year, title, source, checked, doi, identifier)


# Where each entry was checked is noted above it ("record": the work's own record was read; "lists": published
# reference lists agree).  Public DOIs only.
BIBLIOGRAPHY: dict[str, Reference] = {r.key: r for r in (
    # -- class system
    # record: the book's front matter (title page and imprint: National Wetlands Working Group, eds.
    # B.G. Warner and C.D.A. Rubec, Wetlands Research Centre, University of Waterloo, 1997;
    # ISBN 0-662-25857-6).
    _ref("nwwg1997", "National Wetlands Working Group", 1997, "The Canadian Wetland Classification System",
         "2nd edition, Warner, B. G., Rubec, C. D. A. (eds.), Wetlands Research Centre, University of "
         "Waterloo, Waterloo, Ontario", "verified", identifier="ISBN 0-662-25857-6"),
    # -- model outputs and training labels
    # record: the publisher's (MIT Press, Neural Computation 14(1): 21-41, 2002) search page and abstract; the
    # DOI from an index record.
    _ref("saerens2002", "Saerens, M., Latinne, P., Decaestecker, C.", 2002,
         "Adjusting the outputs of a classifier to new a priori probabilities: a simple procedure",
         "Neural Computation 14(1), 21-41", "verified", doi="10.1162/089976602753284446"),
    # record: the journal's article page (JAIR) and the paper's first page (JAIR 11 (1999) 131-167); arXiv copy.
    _ref("brodley1999", "Brodley, C. E., Friedl, M. A.", 1999, "Identifying mislabeled training data",
         "Journal of Artificial Intelligence Research 11, 131-167", "verified", identifier="arXiv 1106.0219"),
    # -- accuracy, areas and sampling
    # record: Canadian Forest Service publications catalogue (NRCan), with DOI; the paper's first page.
    _ref("olofsson2014", "Olofsson, P., Foody, G. M., Herold, M., Stehman, S. V., Woodcock, C. E., Wulder, M. A.",
         2014, "Good practices for estimating area and assessing accuracy of land change",
         "Remote Sensing of Environment 148, 42-57", "verified", doi="10.1016/j.rse.2014.02.015"),
    # record: NASA MODIS land validation summary page (authors, title, RSE 129 (2013) 122-131) and the paper's
    # first page; DOI as given in several published reference lists.
    _ref("olofsson2013", "Olofsson, P., Foody, G. M., Stehman, S. V., Woodcock, C. E.", 2013,
         "Making better use of accuracy data in land change studies: Estimating accuracy and area and quantifying "
         "uncertainty using stratified estimation", "Remote Sensing of Environment 129, 122-131", "verified",
         doi="10.1016/j.rse.2012.10.031"),
    # record: library catalogue entries (3rd ed., New York: John Wiley & Sons, 1977, xvi + 428 p.) and the
    # book's copyright page (ISBN 0-471-16240-X).
    _ref("cochran1977", "Cochran, W. G.", 1977, "Sampling Techniques",
         "3rd edition, John Wiley & Sons, New York", "verified", identifier="ISBN 0-471-16240-X"),
    # lists: title/journal/year in the authors' university repository record; 32(15), 4407-4429 and the DOI
    # agree across published reference lists.
    _ref("pontius2011", "Pontius, R. G., Millones, M.", 2011,
         "Death to Kappa: birth of quantity disagreement and allocation disagreement for accuracy assessment",
         "International Journal of Remote Sensing 32(15), 4407-4429", "secondary",
         doi="10.1080/01431161.2011.552923"),
    # record: national journal-portal record (Taylor & Francis, vol. 35, issue 13, DOI); pages from reference
    # lists.
    _ref("stehman2014", "Stehman, S. V.", 2014,
         "Estimating area and map accuracy for stratified random sampling when the strata are different from the "
         "map classes", "International Journal of Remote Sensing 35(13), 4923-4939", "verified",
         doi="10.1080/01431161.2014.930207"),
    # -- spatial validation and the area of applicability
    # record: publisher's article page (Wiley; Ecography 40(8), authors); pages 913-929 from reference lists.
    _ref("roberts2017", "Roberts, D. R., Bahn, V., Ciuti, S., Boyce, M. S., Elith, J., Guillera-Arroita, G., "
         "Hauenstein, S., Lahoz-Monfort, J. J., Schröder, B., Thuiller, W., Warton, D. I., Wintle, B. A., "
         "Hartig, F., Dormann, C. F.", 2017,
         "Cross-validation strategies for data with temporal, spatial, hierarchical, or phylogenetic structure",
         "Ecography 40(8), 913-929", "verified", doi="10.1111/ecog.02881"),
    # record: IRD documentation-centre record and a library catalogue record (Nature Communications 11, 4540,
    # DOI).
    _ref("ploton2020", "Ploton, P., Mortier, F., Réjou-Méchain, M., Barbier, N., Picard, N., Rossi, V., "
         "Dormann, C., Cornu, G., Viennois, G., Bayol, N., Lyapustin, A., Gourlet-Fleury, S., Pélissier, R.", 2020,
         "Spatial validation reveals poor predictive performance of large-scale ecological mapping models",
         "Nature Communications 11, 4540", "verified", doi="10.1038/s41467-020-18321-y"),
    # lists: authors/title/year in the university repository record; volume 13, pages 1304-1316 and DOI from
    # reference lists (the issue number was not confirmed, so it is not given).
    _ref("mila2022", "Milà, C., Mateu, J., Pebesma, E., Meyer, H.", 2022,
         "Nearest neighbour distance matching Leave-One-Out Cross-Validation for map validation",
         "Methods in Ecology and Evolution 13, 1304-1316", "secondary", doi="10.1111/2041-210X.13851"),
    # record: the journal's article page (Copernicus) and a library catalogue (vol. 17, no. 15, pp.
    # 5897-5912).
    _ref("linnenbrink2024", "Linnenbrink, J., Milà, C., Ludwig, M., Meyer, H.", 2024,
         "kNNDM CV: k-fold nearest-neighbour distance matching cross-validation for map accuracy estimation",
         "Geoscientific Model Development 17(15), 5897-5912", "verified", doi="10.5194/gmd-17-5897-2024"),
    # record: the publisher's article page (Wiley; Volume 12, Issue 9, pp. 1620-1633; authors; DOI).
    _ref("meyer2021", "Meyer, H., Pebesma, E.", 2021,
         "Predicting into unknown space? Estimating the area of applicability of spatial prediction models",
         "Methods in Ecology and Evolution 12(9), 1620-1633", "verified", doi="10.1111/2041-210X.13650"),
    # -- models and explanations
    # lists: pages 785-794 and DOI agree across reference lists; the paper's ACM front matter (KDD '16)
    # quoted.
    _ref("chen2016", "Chen, T., Guestrin, C.", 2016, "XGBoost: A scalable tree boosting system",
         "Proceedings of the 22nd ACM SIGKDD International Conference on Knowledge Discovery and Data Mining, "
         "785-794", "secondary", doi="10.1145/2939672.2939785"),
    # record: a university bibliographic-catalogue record (Kluwer; Machine Learning 45(1), 5-32; DOI).
    _ref("breiman2001", "Breiman, L.", 2001, "Random forests", "Machine Learning 45(1), 5-32", "verified",
         doi="10.1023/A:1010933404324"),
    # record: PubMed Central record PMC7326367 and the OpenAlex record (Nat Mach Intell 2(1), 56-67; DOI).
    _ref("lundberg2020", "Lundberg, S. M., Erion, G., Chen, H., DeGrave, A., Prutkin, J. M., Nair, B., Katz, R., "
         "Himmelfarb, J., Bansal, N., Lee, S.-I.", 2020,
         "From local explanations to global understanding with explainable AI for trees",
         "Nature Machine Intelligence 2(1), 56-67", "verified", doi="10.1038/s42256-019-0138-9"),
    # -- optical indices
    # lists: authors/title and the proceedings' front matter (Third ERTS-1 Symposium, NASA, 1974) read; the
    # NASA
    # technical-reports id, "SP-351" and the pages as given in reference lists.  No DOI exists.
    _ref("rouse1974", "Rouse, J. W., Haas, R. H., Schell, J. A., Deering, D. W.", 1974,
         "Monitoring vegetation systems in the Great Plains with ERTS",
         "Third Earth Resources Technology Satellite-1 Symposium, NASA SP-351, 309-317", "secondary",
         identifier="NASA NTRS 19740022614"),
    # record: the publisher's cover page and abstract page (Taylor & Francis; 17:7, 1425-1432; DOI).
    _ref("mcfeeters1996", "McFeeters, S. K.", 1996,
         "The use of the Normalized Difference Water Index (NDWI) in the delineation of open water features",
         "International Journal of Remote Sensing 17(7), 1425-1432", "verified",
         doi="10.1080/01431169608948714"),
    # record: the publisher's cover page (Taylor & Francis; 27:14, 3025-3033; DOI) and the paper's first page.
    _ref("xu2006", "Xu, H.", 2006, "Modification of normalised difference water index (NDWI) to enhance open "
         "water features in remotely sensed imagery", "International Journal of Remote Sensing 27(14), 3025-3033",
         "verified", doi="10.1080/01431160600589179"),
    # record: the paper's first page and its DOI on an indexing cover page; volume/pages from reference lists.
    _ref("gao1996", "Gao, B.-C.", 1996, "NDWI - A normalized difference water index for remote sensing of "
         "vegetation liquid water from space", "Remote Sensing of Environment 58, 257-266", "verified",
         doi="10.1016/S0034-4257(96)00067-3"),
    # lists: 80(3), 385-396 and DOI agree across reference lists and spectral-index catalogues.
    _ref("wilson2002", "Wilson, E. H., Sader, S. A.", 2002,
         "Detection of forest harvest type using multiple dates of Landsat TM imagery",
         "Remote Sensing of Environment 80(3), 385-396", "secondary", doi="10.1016/S0034-4257(01)00318-2"),
    # record: the university research-portal record (title, J. Photochem. Photobiol. B issue 3, 247-252, March
    # 1994) and a spectral-index catalogue's record (vol. 22, DOI) citing it for the NIR/red-edge-1 index.
    # Corrected: the title formerly given here belongs to the authors' other 1994 paper (J. Plant Physiol.
    # 143(3), 286-292, doi:10.1016/S0176-1617(11)81633-0), which the same catalogue cites for the
    # red-edge-2/red-edge-1 form.
    _ref("gitelson1994", "Gitelson, A., Merzlyak, M. N.", 1994,
         "Quantitative estimation of chlorophyll-a using reflectance spectra: Experiments with autumn "
         "chestnut and maple leaves", "Journal of Photochemistry and Photobiology B: Biology 22(3), 247-252",
         "verified", doi="10.1016/1011-1344(93)06963-4"),
    # lists: title and colloquium agree across reference lists; three give ESA SP-287, 279-286 (one gives
    # 195-213); the astrophysics-data-system code in a list starts at page 279.  No DOI exists.
    _ref("guyot1988", "Guyot, G., Baret, F.", 1988,
         "Utilisation de la haute résolution spectrale pour suivre l'état des couverts végétaux",
         "Proceedings of the 4th International Colloquium on Spectral Signatures of Objects in Remote Sensing, "
         "ESA SP-287, 279-286", "secondary", identifier="ADS 1988ESASP.287..279G"),
    # -- SAR and water
    # lists: PAMI-2(2), 165-168 (March 1980) and DOI from the publisher's citation export quoted in published
    # code.
    _ref("lee1980", "Lee, J.-S.", 1980, "Digital image enhancement and noise filtering by use of local statistics",
         "IEEE Transactions on Pattern Analysis and Machine Intelligence PAMI-2(2), 165-168", "secondary",
         doi="10.1109/TPAMI.1980.4766994"),
    # lists: 39(11), 2373-2379 and DOI agree in reference lists.
    _ref("quegan2001", "Quegan, S., Yu, J. J.", 2001, "Filtering of multichannel SAR images",
         "IEEE Transactions on Geoscience and Remote Sensing 39(11), 2373-2379", "secondary",
         doi="10.1109/36.964973"),
    # lists: SMC-9(1), 62-66 and DOI agree across many reference lists.
    _ref("otsu1979", "Otsu, N.", 1979, "A threshold selection method from gray-level histograms",
         "IEEE Transactions on Systems, Man, and Cybernetics SMC-9(1), 62-66", "secondary",
         doi="10.1109/TSMC.1979.4310076"),
    # record: the journal's open-access record in a library catalogue (DOAJ: authors, title, Copernicus,
    # 2009-03, 9, 303-314), a geological-survey library record (9, no. 2, 303-314) and the paper's first page
    # (Nat. Hazards Earth Syst. Sci., 9, 303-314, 2009); the DOI as given in reference lists.
    _ref("martinis2009", "Martinis, S., Twele, A., Voigt, S.", 2009,
         "Towards operational near real-time flood detection using a split-based automatic thresholding "
         "procedure on high resolution TerraSAR-X data",
         "Natural Hazards and Earth System Sciences 9(2), 303-314", "verified",
         doi="10.5194/nhess-9-303-2009"),
    # record: the astrophysics-data-system record export (AJ 108, 2348-2361, December 1994, DOI, bibcode) and
    # the preprint's first page (arXiv astro-ph/9408030: authors, title, "December 1994 issue of the
    # Astronomical Journal").
    _ref("ashman1994", "Ashman, K. M., Bird, C. M., Zepf, S. E.", 1994,
         "Detecting bimodality in astronomical datasets", "The Astronomical Journal 108, 2348-2361",
         "verified", doi="10.1086/117248"),
    # -- terrain
    # record: the publisher's index record (title, author, journal, DOI) and the paper's first page (Proc.
    # IEEE
    # 69(1), January 1981, p. 14).
    _ref("horn1981", "Horn, B. K. P.", 1981, "Hill shading and the reflectance map",
         "Proceedings of the IEEE 69(1), 14-47", "verified", doi="10.1109/PROC.1981.11918"),
    # lists: 12(1), 47-56 and DOI agree across reference lists (incl. terrain-library documentation).
    _ref("zevenbergen1987", "Zevenbergen, L. W., Thorne, C. R.", 1987,
         "Quantitative analysis of land surface topography", "Earth Surface Processes and Landforms 12(1), 47-56",
         "secondary", doi="10.1002/esp.3290120107"),
    # lists: 143, 107-122 and DOI in a journal article's reference list.
    _ref("guisan1999", "Guisan, A., Weiss, S. B., Weiss, A. D.", 1999,
         "GLM versus CCA spatial modeling of plant species distribution", "Plant Ecology 143, 107-122",
         "secondary", doi="10.1023/A:1009841519580"),
    # lists: 24(1), 43-69 and DOI agree across reference lists.
    _ref("beven1979", "Beven, K. J., Kirkby, M. J.", 1979,
         "A physically based, variable contributing area model of basin hydrology",
         "Hydrological Sciences Bulletin 24(1), 43-69", "secondary", doi="10.1080/02626667909491834"),
    # lists: 62, 117-127 and DOI agree across reference lists (incl. the first author's software docs).
    _ref("barnes2014", "Barnes, R., Lehman, C., Mulla, D.", 2014, "Priority-flood: An optimal depression-filling "
         "and watershed-labeling algorithm for digital elevation models", "Computers & Geosciences 62, 117-127",
         "secondary", doi="10.1016/j.cageo.2013.04.024"),
    # lists: 28, 323-344 and DOI agree across reference lists.
    _ref("ocallaghan1984", "O'Callaghan, J. F., Mark, D. M.", 1984,
         "The extraction of drainage networks from digital elevation data",
         "Computer Vision, Graphics, and Image Processing 28, 323-344", "secondary",
         doi="10.1016/S0734-189X(84)80011-0"),
    # lists: 17(3), 413-422 and DOI agree across reference lists.
    _ref("freeman1991", "Freeman, T. G.", 1991, "Calculating catchment area with divergent flow based on a "
         "regular grid", "Computers & Geosciences 17(3), 413-422", "secondary",
         doi="10.1016/0098-3004(91)90048-I"),
    # lists: 5(1), 59-79 and DOI agree across reference lists.
    _ref("quinn1991", "Quinn, P., Beven, K., Chevallier, P., Planchon, O.", 1991,
         "The prediction of hillslope flow paths for distributed hydrological modelling using digital terrain "
         "models", "Hydrological Processes 5(1), 59-79", "secondary", doi="10.1002/hyp.3360050106"),
    # lists: 112(9), 3469-3481 and DOI, including the publisher's citation export quoted in a list.
    _ref("renno2008", "Rennó, C. D., Nobre, A. D., Cuartas, L. A., Soares, J. V., Hodnett, M. G., Tomasella, J., "
         "Waterloo, M. J.", 2008, "HAND, a new terrain descriptor using SRTM-DEM: mapping terra-firme rainforest "
         "environments in Amazonia", "Remote Sensing of Environment 112(9), 3469-3481", "secondary",
         doi="10.1016/j.rse.2008.03.018"),
    # lists: 60(1), 94-109 and DOI in terrain-library documentation and a reference list.
    _ref("murphy2009", "Murphy, P. N. C., Ogilvie, J., Arp, P.", 2009,
         "Topographic modelling of soil moisture conditions: a comparison and verification of two models",
         "European Journal of Soil Science 60(1), 94-109", "secondary",
         doi="10.1111/j.1365-2389.2008.01094.x"),
    # record: the publisher's abstract page (title, DOI); volume 39(12) also in terrain-library documentation.
    _ref("gallant2003", "Gallant, J. C., Dowling, T. I.", 2003,
         "A multiresolution index of valley bottom flatness for mapping depositional areas",
         "Water Resources Research 39(12), 1347", "verified", doi="10.1029/2002WR001426"),
    # -- monitoring: trend tests and slopes
    # record: the paper's first page with the archive's cover sheet (Econometrica, Vol. 13, No. 3 (Jul.,
    # 1945), pp. 245-259; the Econometric Society); the DOI (the archive's, from its stable id 1907187) as
    # given in reference lists.
    _ref("mann1945", "Mann, H. B.", 1945, "Nonparametric tests against trend", "Econometrica 13(3), 245-259",
         "verified", doi="10.2307/1907187"),
    # record: the paper's first page (Journal of Hydrology 204 (1998) 182-196; Khaled H. Hamed, A. Ramachandra
    # Rao); issue 1-4 and the DOI agree across reference lists.
    _ref("hamed1998", "Hamed, K. H., Rao, A. R.", 1998,
         "A modified Mann-Kendall trend test for autocorrelated data",
         "Journal of Hydrology 204(1-4), 182-196", "verified", doi="10.1016/S0022-1694(97)00125-X"),
    # record: the offprint's cover and first page (Koninklijke Nederlandse Akademie van Wetenschappen,
    # Proceedings Vol. LIII, Nos. 3 and 4, 1950; also Indagationes Mathematicae Vol. XII) and the reprint's
    # first page (Parts I-III at 386-392, 521-525, 1397-1412).  The 1950 papers have no DOI: the DOI is the
    # 1992 reprint's (editors, pages and DOI agree across reference lists).
    _ref("theil1950", "Theil, H.", 1950,
         "A rank-invariant method of linear and polynomial regression analysis",
         "Proceedings of the Koninklijke Nederlandse Akademie van Wetenschappen 53, 386-392, 521-525, "
         "1397-1412; reprinted in Raj, B., Koerts, J. (eds.), Henri Theil's Contributions to Economics and "
         "Econometrics, Springer, Dordrecht, 1992, 345-381", "verified", doi="10.1007/978-94-011-2546-8_20"),
    # record: the paper's first page with the archive's cover sheet (Journal of the American Statistical
    # Association, Vol. 63, No. 324 (Dec., 1968), pp. 1379-1389) and an index record; the publisher's DOI as
    # given in reference lists (the archive's alias is 10.2307/2285891).
    _ref("sen1968", "Sen, P. K.", 1968, "Estimates of the regression coefficient based on Kendall's tau",
         "Journal of the American Statistical Association 63(324), 1379-1389", "verified",
         doi="10.1080/01621459.1968.10480934"),
    # lists: 28(2), 126-135 and DOI agree across reference lists (incl. statistics-library documentation).
    _ref("pettitt1979", "Pettitt, A. N.", 1979, "A non-parametric approach to the change-point problem",
         "Journal of the Royal Statistical Society: Series C (Applied Statistics) 28(2), 126-135",
         "secondary", doi="10.2307/2346729"),
    # lists: 57(1), 289-300 and the publisher's DOI agree across reference lists (incl. package docs).
    _ref("benjamini1995", "Benjamini, Y., Hochberg, Y.", 1995,
         "Controlling the false discovery rate: a practical and powerful approach to multiple testing",
         "Journal of the Royal Statistical Society: Series B (Methodological) 57(1), 289-300", "secondary",
         doi="10.1111/j.2517-6161.1995.tb02031.x"),
    # lists: the agency's citation form (book 4, chap. A3, 458 p., DOI; supersedes the earlier edition)
    # repeated across reference lists.
    _ref("helsel2020", "Helsel, D. R., Hirsch, R. M., Ryberg, K. R., Archfield, S. A., Gilroy, E. J.", 2020,
         "Statistical methods in water resources", "U.S. Geological Survey Techniques and Methods, book 4, "
         "chap. A3, 458 p. (supersedes Techniques of Water-Resources Investigations, book 4, chap. A3)",
         "secondary", doi="10.3133/tm4a3"),
    # -- monitoring: impact designs
    # lists: two reference lists give the DOI, one of them 161(2), 145-178 (a thinner check than the others).
    _ref("underwood1992", "Underwood, A. J.", 1992,
         "Beyond BACI: the detection of environmental impacts on populations in the real, but variable, "
         "world",
         "Journal of Experimental Marine Biology and Ecology 161(2), 145-178", "secondary",
         doi="10.1016/0022-0981(92)90094-Q"),
    # -- monitoring: recovery after disturbance
    # lists: authors, title, 194, 303-321 and DOI in a national data catalogue's record of the authors'
    # derived product and in reference lists.
    _ref("white2017", "White, J. C., Wulder, M. A., Hermosilla, T., Coops, N. C., Hobart, G. W.", 2017,
         "A nationwide annual characterization of 25 years of forest disturbance and recovery for Canada "
         "using Landsat time series", "Remote Sensing of Environment 194, 303-321", "secondary",
         doi="10.1016/j.rse.2017.03.035"),
    # lists: 205, 32-45 and DOI agree across reference lists and package documentation, which name this paper
    # as the source of the relative recovery indicator (RRI), R80P and YrYr.
    _ref("frazier2018", "Frazier, R. J., Coops, N. C., Wulder, M. A., Hermosilla, T., White, J. C.", 2018,
         "Analyzing spatial and temporal variability in short-term rates of post-fire vegetation return from "
         "Landsat time series", "Remote Sensing of Environment 205, 32-45", "secondary",
         doi="10.1016/j.rse.2017.11.007"),
)}

# What each method of a run cites (keys of BIBLIOGRAPHY).
METHODS: dict[str, tuple[str, ...]] = {
    "spatial_cv": ("roberts2017", "ploton2020"),
    "cv_distance_diagnostics": ("mila2022", "linnenbrink2024"),
    "disagreement": ("pontius2011",),
    "xgboost": ("chen2016",),
    "random_forest": ("breiman2001",),
    "area_of_applicability": ("meyer2021",),
    "tree_shap": ("lundberg2020",),
    "class_definitions": ("nwwg1997",),
    "priors": ("saerens2002",),
    "suspect_labels": ("brodley1999",),
    "stratified_area_estimation": ("olofsson2014", "olofsson2013"),
    "sample_size": ("cochran1977", "olofsson2014"),
    "lee_filter": ("lee1980",),
    "multitemporal_filter": ("quegan2001",),
    "otsu_threshold": ("otsu1979",),
    "priority_flood": ("barnes2014",),
    "d8": ("ocallaghan1984",),
    "mfd": ("freeman1991",),
    "mfd_quinn": ("quinn1991",),
    # monitoring.  Left out until a stable identifier is found in a record: Kendall (Rank Correlation Methods,
    # 4th ed.; no ISBN found, editions dated 1970, 1975 and 1976 in lists), Green (1979, Sampling Design and
    # Statistical Methods for Environmental Biologists; no ISBN found), Stewart-Oaten, Murdoch & Parker (1986,
    # Ecology 67(4), 929-940; no DOI found, so there is no "paired_baci" entry yet) and Kennedy et al. (2012,
    # Remote Sensing of Environment 122, 117-133; the one DOI listed for it is another paper's, and no source
    # found names it as the origin of the relative recovery indicator).
    "mann_kendall": ("mann1945",),
    "hamed_rao": ("hamed1998",),
    "sen_slope": ("theil1950", "sen1968"),
    "pettitt": ("pettitt1979",),
    "fdr": ("benjamini1995",),
    "baci": ("underwood1992",),
    "split_threshold": ("martinis2009", "ashman1994"),
    "mndwi_water": ("xu2006",),
    "recovery": ("white2017", "frazier2018"),
}


def _fold(text: str) -> str:
    """Lower-case ASCII (accents dropped) so 'Renno' matches 'Rennó'."""
    return unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode().lower()


def match(text: str) -> list[Reference]:
    """Bibliography entries a free-text reference names: first author's surname and year both present.

    A reference attr may name several works (``"A (2002) ...; after B (1996) ..."``); each is returned.
    """
    folded = _fold(text)
    hits = []
    for ref in BIBLIOGRAPHY.values():
        surname = re.escape(_fold(ref.first_author))
        if re.search(rf"\b{surname}\b", folded) and re.search(rf"\b{ref.year}\b", folded):
            hits.append(ref)
    return hits


@dataclass
class Cited:
    """A reference as the report lists it, with what it was used for."""

    text: str
    sort_key: str
    used_for: list[str] = field(default_factory=list)
    reference: Reference | None = None

    def add_use(self, what: str) -> None:
        if what not in self.used_for:
            self.used_for.append(what)


class Citations:
    """Accumulates the references of a run, de-duplicated, in first-author order."""

    def __init__(self) -> None:
        self._by_text: dict[str, Cited] = {}

    def add(self, ref: Reference, used_for: str) -> Cited:
        cited = self._by_text.setdefault(ref.citation(), Cited(ref.citation(), _fold(ref.citation()),
                                                              reference=ref))
        cited.add_use(used_for)
        return cited

    def add_text(self, text: str, used_for: str) -> list[Cited]:
        """Cite a recorded reference string: its bibliography entries, or the string itself when none match."""
        refs = match(text)
        if refs:
            return [self.add(r, used_for) for r in refs]
        cited = self._by_text.setdefault(text.strip(), Cited(text.strip(), _fold(text)))
        cited.add_use(used_for)
        return [cited]

    def add_method(self, method: str, used_for: str) -> list[Cited]:
        if method not in METHODS:
            raise KeyError(f"method {method!r} has no entry in wetlandflow.report.references.METHODS; "
                           f"known: {sorted(METHODS)}")
        return [self.add(BIBLIOGRAPHY[k], used_for) for k in METHODS[method]]

    def entries(self) -> list[Cited]:
        return sorted(self._by_text.values(), key=lambda c: c.sort_key)


def feature_methods(name: str, attrs: Mapping[str, object], parameters: Mapping[str, object]) -> list[str]:
    """Methods a feature used beyond its own ``reference`` attr, read from its recorded parameters.

    The speckle filter, DEM conditioning and flow routing are recorded as parameters, and surface-water
    frequency thresholds each date by Otsu's method; their sources are cited too.
    """
    methods = []
    speckle = parameters.get("speckle_filter")
    if isinstance(speckle, Mapping):
        methods.append({"lee": "lee_filter", "multitemporal": "multitemporal_filter"}.get(str(speckle.get(
            "method")), ""))
    if str(parameters.get("conditioning", "")).startswith("priority_flood") or "Priority-Flood" in str(
            attrs.get("method", "")):
        methods.append("priority_flood")
    for key in ("method", "routing"):
        value = str(parameters.get(key, ""))
        if value in ("d8", "mfd", "mfd_quinn"):
            methods.append(value)
    if name in ("water_frequency", "hydroperiod"):
        methods.append("otsu_threshold")
    return [m for m in dict.fromkeys(methods) if m]


def cite_features(citations: Citations, features: Mapping[str, Mapping[str, object]],
                  parameters: Mapping[str, Mapping[str, object]]) -> dict[str, list[Cited]]:
    """Add every feature's sources to ``citations``; return the citations per feature (empty: none recorded)."""
    out: dict[str, list[Cited]] = {}
    for name, attrs in features.items():
        cited: list[Cited] = []
        text = str(attrs.get("reference", "") or "").strip()
        if text:
            cited += citations.add_text(text, f"feature {name}")
        for method in feature_methods(name, attrs, parameters.get(name, {})):
            cited += citations.add_method(method, f"feature {name}")
        out[name] = list({id(c): c for c in cited}.values())
    return out


def collect(methods: Iterable[tuple[str, str]]) -> Citations:
    """A :class:`Citations` holding the sources of ``(method, used_for)`` pairs."""
    citations = Citations()
    for method, used_for in methods:
        citations.add_method(method, used_for)
    return citations
