"""The report's document: the template context, the jinja2 rendering and WeasyPrint's typesetting."""

from __future__ import annotations

import hashlib
import re
from importlib import resources
from pathlib import Path

from impact.dossier.calibfigure import calibration_context
from impact.dossier.cautions import cautions
from impact.store.verify import EDITED_MARK, PDF_MARK, check_folder
from impact.errors import InstallationError, ReadError, SettingError, WriteError
from impact.dossier.formatting import fmt_num, fmt_prob
from impact.store.outfolder import INVENTORY, REPORT_HASH
from impact.store.results import Results, load_results, write_file_atomic
from impact.dossier.bottomline import STATUS_WORDS, run_label
from impact.dossier.eradication_reading import eradication_sentences
from impact.dossier.verdict import horizon_rule_text, reading, thin_run
from impact.dossier.webfigure import dot_available, food_web_svg, web_legend
from impact.dossier.structures_verdict import structure_reading
from impact.dossier.studyline import best_study_sentence
from impact.dossier.figures import ASSET_SCHEME, KIND_STYLE, OPTION_COLOURS, Assets, bands_figure
from impact.dossier.sections import (dynamics_context, press_context, sensitivity_context, studies_context,
    weighing_context)
from impact.dossier.tables import (comparisons_context, effects_table_context, first_rows, iucn_context,
    objectives_context, risk_table_context, rows_note)

PAPERS = {"a4": "A4", "letter": "letter"}
ASSET_TYPES = {".css": "text/css", ".svg": "image/svg+xml", ".png": "image/png"}


def report_context(res: Results, assets: Assets) -> dict:
    """Everything the template prints, already formatted from the saved numbers."""
    m = res.manifest
    counts = m.counts
    failed = {k: int(v.get("failed", 0)) for k, v in counts.failed_by_option.items()}
    options = []
    for k, o in enumerate(m.options):
        colour = OPTION_COLOURS[k % len(OPTION_COLOURS)]
        options.append(dict(name=o.name, description=o.description, interventions=o.interventions,
                            touches=o.touches, failed=failed.get(o.name, 0),
                            figure=assets.add(f"bands-{k}.png", bands_figure(res, o.name, colour), "image/png"),
                            risk=risk_table_context(res, o.name), effects=effects_table_context(res, o.name)))
    thin, why = thin_run(m)
    verdict = reading(m, res.risk, res.effects, res.objectives, res.comparisons)
    across = structure_reading(m, res.risk, res.effects, res.objectives, res.structures)  # None without doubts
    warnings = cautions(m, res.objectives, why, res.dynamics, res.sensitivity, res.calibration)
    priors = [dict(name=r["name"], distribution=r.get("arguments", r.get("distribution", "")), unit=r.get("unit", ""),
                   source=r.get("source", ""), description=r.get("description", "")) for _, r in res.priors.iterrows()]
    failed_by_option = [dict(option=k, failed=v.get("failed", 0)) for k, v in counts.failed_by_option.items()]
    return dict(
        m=m, case=m.case, title=m.case.title, date=m.started_utc[:10],
        verdict=verdict, across=across, caution=m.caution, run_label=run_label, status_words=STATUS_WORDS,
        horizon_rule=horizon_rule_text(m), warnings=[w.text for w in warnings],
        # the thin-run statement has its own box on page 1; the others that matter most go above the verdict
        top_warnings=[w.text for w in warnings if 0 < w.rank <= 3], judgement=m.judgement,
        objectives=objectives_context(res), comparisons=comparisons_context(res), failed_baseline=failed.get("baseline", 0),
        species=m.species, interactions=m.interactions, equations=m.equations,
        foodweb=assets.add("foodweb.svg", food_web_svg(m), "image/svg+xml"), web_legend=web_legend(m),
        web_drawn=dot_available(), priors=priors, thin=thin,
        interventions=m.interventions, options=options, iucn=iucn_context(res),
        sensitivity=sensitivity_context(res, assets), studies=studies_context(res, assets), weighing=weighing_context(res),
        study_line=best_study_sentence((res.sensitivity or {}).get("studies"), m.judgement.material_risk), dynamics=dynamics_context(res, assets), press=press_context(res),
        calibration=calibration_context(m, res.calibration, assets.add),
        counts=counts, failed_by_option=failed_by_option, fmt_num=fmt_num, fmt_prob=fmt_prob,
        horizons=[fmt_num(h) for h in m.horizons], kind_verbs={k: v[2] for k, v in KIND_STYLE.items()},
        command=" ".join(m.command), packages=m.packages,
        assumptions=m.assumptions, plausibility=m.plausibility,
        eradication=eradication_sentences(m, res.eradication),
    )



def template_root():
    """Folder holding report.html and its assets (installed package data or the source checkout)."""
    try:
        root = resources.files("impact.templates")
        if root.joinpath("report.html").is_file():
            return root
    except ModuleNotFoundError:
        pass
    root = Path(__file__).resolve().parent.parent.parent / "templates"
    if (root / "report.html").is_file():
        return root
    raise InstallationError("the report templates (report.html, report.css) were not found; reinstall impact")


def template_assets(root) -> Assets:
    """Every stylesheet or image shipped beside the templates, by file name."""
    a = Assets()
    for entry in root.iterdir():
        mime = ASSET_TYPES.get(Path(entry.name).suffix)
        if mime and entry.is_file():
            a.add(entry.name, entry.read_bytes(), mime)
    return a


def _fetcher_class():
    from weasyprint.urls import URLFetcher, URLFetcherResponse

    class AssetFetcher(URLFetcher):
        """Serve only named assets; refuse files, network and every other scheme."""

        def __init__(self, assets: Assets):
            super().__init__(allowed_protocols=())
            self.assets = assets
            self.served: list[str] = []
            self.refused: list[str] = []

        def fetch(self, url, headers=None):
            name = url[len(ASSET_SCHEME):] if url.startswith(ASSET_SCHEME) else None
            if name is None or name not in self.assets.files:
                self.refused.append(url)
                raise ValueError(f"refused to fetch {url!r}: only the report's own assets are served")
            data, mime = self.assets.files[name]
            self.served.append(url)
            return URLFetcherResponse(url, body=data, headers={"Content-Type": mime})

    return AssetFetcher


def make_fetcher(assets: Assets):
    """A WeasyPrint URL fetcher serving ``assets`` only."""
    return _fetcher_class()(assets)


def render_pdf(html: str, assets: Assets):
    """Typeset HTML with the restricted fetcher; returns (pdf bytes, fetcher)."""
    import logging

    from weasyprint import HTML

    fetcher = make_fetcher(assets)
    # refused fetches are expected for hostile input; keep them out of the user's terminal
    logging.getLogger("weasyprint").setLevel(logging.ERROR)
    pdf = HTML(string=html, base_url=ASSET_SCHEME, url_fetcher=fetcher).write_pdf()
    return pdf, fetcher


_TEXT = re.compile(r">([^<]+)<")
# what must not break across lines: an interval [a, b], a unit a/b, a hyphenated word (press-harvest)
# (short tokens only: a path or a long compound may still break where it must)
_KEEP = re.compile(r"\[[^\[\]<>]{1,60}\]|(?<![\w/.-])\w{1,12}(?:[/-]\w{1,12}){1,2}(?![\w/.-])")


def keep_together(html: str) -> str:
    """The body's text with every interval, unit and hyphenated word wrapped in a span that does not break
    (``nowrap``): a narrow table column then wraps between them, never inside one. Only markup is added,
    so the words and their characters stay as written (copying and searching the PDF find them)."""
    head, sep, body = html.partition("<body>")
    if not sep:
        return html
    keep = lambda t: ">" + _KEEP.sub(lambda k: f'<span class="nb">{k.group(0)}</span>', t.group(1)) + "<"
    return head + sep + _TEXT.sub(keep, body)


def report_html(res: Results, paper: str = "a4", dossier: dict | None = None) -> tuple[str, Assets]:
    """The filled template and the assets it links to.

    ``dossier``: ``inventory_sha256`` (the hash page 1 states; None for a folder without an
    inventory) and ``edited`` (files that differ from their recorded hashes, see :func:`write_report`).
    """
    import jinja2

    if paper not in PAPERS:
        raise SettingError("paper", f"must be one of {', '.join(PAPERS)}")
    root = template_root()
    assets = template_assets(root)
    env = jinja2.Environment(loader=jinja2.FunctionLoader(lambda n: root.joinpath(n).read_text(encoding="utf-8")),
                             autoescape=True, undefined=jinja2.StrictUndefined, trim_blocks=True, lstrip_blocks=True)
    # per-row tables print their first rows and name the file holding them all (impact.dossier.tables)
    env.filters["first_rows"], env.globals["rows_note"] = first_rows, rows_note
    ctx = report_context(res, assets)
    ctx["dossier"] = {"inventory_sha256": None, "edited": [], **(dossier or {}), "mark": PDF_MARK,
                      "edited_mark": EDITED_MARK}
    html = env.get_template("report.html").render(**ctx, paper=PAPERS[paper], asset=ASSET_SCHEME)
    return keep_together(html), assets


def write_report(results_dir, out=None, paper: str = "a4", accept_edits: bool = False) -> Path:
    """Build the PDF from a saved results directory; written to a temporary name, then renamed.

    The folder is first checked against its ``inventory.json``: a file changed, missing or added
    since the run is refused (:class:`ReadError` naming it) unless ``accept_edits``, and then page 1
    says which files differ. Page 1 states the SHA-256 of the inventory either way.
    """
    res = load_results(results_dir)  # a damaged folder is named for what is damaged (file, column) first
    check = check_folder(results_dir)
    edited = check.differences()
    if edited and not accept_edits:
        first = (check.changed + check.missing + check.added)[0]
        raise ReadError(str(Path(results_dir) / first), "",
                        f"differs from what impact wrote ({len(edited)} file(s): {'; '.join(edited)}); no report was "
                        "built. Rerun the assessment, or set `accept_edits` to build a report that says so on page 1")
    out = Path(out) if out is not None else Path(results_dir) / "report.pdf"
    html, assets = report_html(res, paper, dict(inventory_sha256=check.inventory_sha256,
                                                # (names as CSS text on page 1: nothing that could end the string)
                                                edited=[re.sub(r"[^\w./-]", "?", rel)
                                                        for rel in check.changed + check.missing + check.added]))
    pdf, _ = render_pdf(html, assets)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
        write_file_atomic(out, pdf)  # mode from the umask, like the tables beside it
        if out.name == "report.pdf" and (out.parent / INVENTORY).is_file():
            # the report's own hash beside it: the inventory cannot hold it (the report states the inventory's)
            write_file_atomic(out.parent / REPORT_HASH, f"{hashlib.sha256(pdf).hexdigest()}  report.pdf\n".encode())
    except OSError as exc:
        raise WriteError(exc.filename or out, f"cannot write the report ({exc.strerror or exc})") from None
    return out
