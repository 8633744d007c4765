"""The assessment document (package: ``tables``, ``figures``, ``sections``, ``render``): a PDF rebuilt from a saved results directory alone.

The report reads ``manifest.json`` and the CSV tables written by ``impact assess`` (and the
``sensitivity/`` and ``dynamics/`` sub-directories when those stages ran), draws its figures
with matplotlib (PNG; the food-web diagram as SVG), fills the jinja2 templates and lets WeasyPrint typeset the result.
It never re-simulates and prints no number that is not in the saved results: verdicts, warnings
and the IUCN reading are classifications and wording of saved numbers.

Templates
---------
The canonical templates live in the repository's top-level ``templates/`` folder.  The build
maps that folder to the package ``impact.templates`` (``package-dir`` in ``pyproject.toml``),
so a non-editable ``pip install .`` ships them as package data; a source checkout finds them
next to the package.

Safety
------
Case text (titles, names, sources) is untrusted: templates are rendered with autoescaping and
WeasyPrint gets :class:`AssetFetcher`, which serves only the named template assets and the
figures of the current report under the ``impact-asset:`` scheme and refuses every other URL
(files, network, data URIs).
"""

from impact.store.results import Results, load_results, read_table
from impact.dossier.figures import ASSET_SCHEME, Assets
from impact.dossier.render import make_fetcher, render_pdf, report_context, report_html, write_report
from impact.dossier.sections import hinges_text
from impact.dossier.tables import iucn_rows

__all__ = ["ASSET_SCHEME", "Assets", "Results", "hinges_text", "iucn_rows", "load_results", "make_fetcher", "read_table",
           "render_pdf", "report_context", "report_html", "write_report"]
