"""Cost of the report stage alone: the PDF rebuilt from a saved demo results directory.

Usage::

    python bench/bench_report.py                     # assess the demo once (no PDF), then time the report
    python bench/bench_report.py --results DIR       # time the report of an existing results directory

Prints, each measured in this same run (minimum of ``--repeat`` runs, the machine may be shared):

1. ``impact report DIR`` as a separate process: wall and CPU seconds (user + system of that process,
   imports included, the way a user meets them);
2. a process with the same imports typesetting a one-page document instead (the floor: imports and
   WeasyPrint's fixed cost), and the report's ratio to it;
3. in-process, the stages of the report: figures and tables (the template context; of it, matplotlib
   rasterizing the figures), the HTML, WeasyPrint's layout and its PDF writing (of it, subsetting the
   fonts), their total against the 3 s target, and WeasyPrint's share (layout + writing) of the
   in-process report and of the report process; pages and PDF size;
4. what the per-horizon risk and effects tables cost WeasyPrint (the same document typeset without
   them), and what stands in the way of the target.

Measured 2026-12-05 on the shared 2-core machine (load 6-11, so read CPU seconds, not wall), one run
each, the demo's saved results: with the tighter print style, 16 pages: the report process 8.1 CPU s
(the one-page floor 2.3 s); in-process figures, tables and HTML 2.05 s, WeasyPrint layout 2.91 s, PDF
writing 1.18 s: WeasyPrint 65 % of the in-process report's CPU, 50 % of the process's. Before (20
pages, the same content): 1.98 / 2.58 / 1.21 s, WeasyPrint 64 %. Fewer pages did not make WeasyPrint
cheaper: its cost follows the boxes laid out (the same tables and paragraphs), not the pages.

Later the same day (load 2-3, 17 pages; the tree before and after, alternately, three processes each,
minimum of 5 in each): the in-process report 5.6-5.7 -> 5.5 CPU s, still 2.5 s above the 3 s target:
figures, tables and HTML 1.56-1.61 -> 1.36-1.42 s (each figure drawn at its printed size; matplotlib
rasterizing 1.0 -> 0.7 s), WeasyPrint layout 2.5-2.6 s and PDF writing 1.0 s unchanged (subsetting the
fonts with fontTools 0.4 s of it; with the HarfBuzz-subset library loaded, under 0.01 s and the writing
0.65 s); the PDF 533 -> 467 KiB. The four per-horizon tables cost WeasyPrint 1.2 s of its 3.4 s.
The report process: 7.3 CPU s, its one-page floor (imports, WeasyPrint's fixed cost) 1.9 s. What else
was tried, WeasyPrint's layout + writing in CPU s: the intervals' no-break spans (600 of the 1,046
spans) as no-break spaces -0.25 s (not done: the PDF's copied text would change); the fonts embedded
whole -0.3 s for a PDF 2.5 times larger (not done); no table-of-contents leaders, no running title,
rows free to break across pages, separate table borders: no change beyond the noise.
"""

from __future__ import annotations

import argparse
import re
import sys
import tempfile
import time
from pathlib import Path

from timing import run_python

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "casework" / "island_mesopredator.toml"

FLOOR = """
import impact.cli, impact.api  # what `impact report` imports before it reads anything
from impact.dossier.render import render_pdf, report_html
from impact.dossier.figures import Assets
import matplotlib.figure
render_pdf("<html><body><h1>floor</h1><table><tr><td>1</td></tr></table></body></html>", Assets())
"""

def child(args: list[str]) -> tuple[float, float]:
    """Run a Python child process: (wall seconds, CPU seconds of that process)."""
    return run_python(args)[:2]


def best(runs: list[tuple[float, float]]) -> tuple[float, float]:
    return min(r[0] for r in runs), min(r[1] for r in runs)


class Stopwatch:
    """CPU seconds spent inside the wrapped functions (a sub-split of a stage; names rebound, then restored)."""

    def __init__(self, targets: list[tuple[object, str]]):
        self.targets, self.saved, self.cpu = targets, [], 0.0

    def __enter__(self):
        for owner, name in self.targets:
            fn = getattr(owner, name)
            self.saved.append((owner, name, fn))

            def timed(*a, _fn=fn, **k):
                c = time.process_time()
                try:
                    return _fn(*a, **k)
                finally:
                    self.cpu += time.process_time() - c

            setattr(owner, name, timed)
        return self

    def __exit__(self, *exc):
        for owner, name, fn in reversed(self.saved):
            setattr(owner, name, fn)


def stages(results: Path) -> dict:
    """Wall and CPU seconds of each in-process stage of one report, with two sub-splits: matplotlib's
    rasterizing (inside the figures and tables) and the fonts' subsetting (inside the PDF writing)."""
    from weasyprint import HTML
    from weasyprint.pdf import fonts

    from impact.dossier import calibfigure, figures, studyfigure
    from impact.dossier.figures import ASSET_SCHEME
    from impact.dossier.render import load_results, make_fetcher, report_html

    out = {}

    def clock(name, fn):
        t, c = time.perf_counter(), time.process_time()
        v = fn()
        out[name] = (time.perf_counter() - t, time.process_time() - c)
        return v

    res = clock("load the results", lambda: load_results(results))
    # every figure is rasterized by chart.png_bytes, imported by name into these three modules
    with Stopwatch([(m, "png_bytes") for m in (figures, calibfigure, studyfigure)]) as raster:
        html, assets = clock("figures, tables and HTML", lambda: report_html(res))
    # render_pdf's two halves, timed apart
    doc = clock("WeasyPrint layout", lambda: HTML(string=html, base_url=ASSET_SCHEME,
                                                  url_fetcher=make_fetcher(assets)).render())
    with Stopwatch([(fonts.Font, "clean")]) as subset:
        pdf = clock("WeasyPrint PDF writing", doc.write_pdf)
    out["rasterizing"], out["font subsetting"] = raster.cpu, subset.cpu
    out["pages"], out["bytes"] = len(doc.pages), len(pdf)
    # what the per-horizon risk and effects tables (one pair per option) cost WeasyPrint: the same
    # document typeset without them (a measurement only; the report keeps them)
    lean = re.sub(r'<table class="numbered risk">.*?</table>', "", html, flags=re.S)
    c = time.process_time()
    HTML(string=lean, base_url=ASSET_SCHEME, url_fetcher=make_fetcher(assets)).render().write_pdf()
    out["without per-horizon tables"] = time.process_time() - c
    out["per-horizon tables"] = html.count('<table class="numbered risk">')
    return out


def subsetter() -> str:
    """Which library WeasyPrint embeds fonts with: HarfBuzz's (C, when installed) or fontTools (Python)."""
    try:
        from weasyprint.text.ffi import harfbuzz_subset
    except ImportError:
        return "unknown"
    return "HarfBuzz (libharfbuzz-subset)" if harfbuzz_subset is not None else "fontTools (libharfbuzz-subset not found)"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--results", default=None, help="an existing results directory (default: assess the demo once)")
    ap.add_argument("--case", default=str(DEMO))
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    if args.results:
        results = Path(args.results)
    else:
        results = Path(tempfile.mkdtemp(prefix="impact-bench-report-")) / "demo"
        print(f"assessing {args.case} once (no PDF) into {results} ...", flush=True)
        child(["-m", "impact.cli", "assess", args.case, "--out", str(results), "--no-report", "--quiet"])
    measure(results, args.repeat)
    return 0


def measure(results: Path, repeat: int) -> float:
    """Print the report stage's figures on the results in ``results``; return the in-process
    report's CPU seconds (the figure its 3 s target is read against)."""
    pdf = results.parent / "bench-report.pdf"
    rep = best([child(["-m", "impact.cli", "report", str(results), "--out", str(pdf)]) for _ in range(repeat)])
    flo = best([child(["-c", FLOOR]) for _ in range(repeat)])
    print(f"report stage, own process      wall {rep[0]:6.2f} s   CPU {rep[1]:6.2f} s   (minimum of {repeat})")
    print(f"one-page floor, own process    wall {flo[0]:6.2f} s   CPU {flo[1]:6.2f} s   (same imports, one page)")
    print(f"report / floor                 wall {rep[0] / flo[0]:6.2f}x  CPU {rep[1] / flo[1]:6.2f}x")
    print(f"report above the floor         wall {rep[0] - flo[0]:6.2f} s   CPU {rep[1] - flo[1]:6.2f} s")
    runs = [stages(results) for _ in range(repeat)]
    parts = ("load the results", "figures, tables and HTML", "WeasyPrint layout", "WeasyPrint PDF writing")
    subs = {"figures, tables and HTML": ("rasterizing", "of it matplotlib rasterizing the figures"),
            "WeasyPrint PDF writing": ("font subsetting", "of it subsetting the fonts")}
    cpu = {}
    for name in parts:
        w, c = best([r[name] for r in runs])
        cpu[name] = c
        print(f"  {name:<28} wall {w:6.2f} s   CPU {c:6.2f} s")
        if name in subs:
            key, label = subs[name]
            print(f"    {label:<40}  CPU {min(r[key] for r in runs):6.2f} s")
    total = sum(cpu.values())
    weasy = cpu["WeasyPrint layout"] + cpu["WeasyPrint PDF writing"]
    print(f"  {'in-process report, total':<28}                 CPU {total:6.2f} s   (target 3 s)")
    print(f"  WeasyPrint's share            {weasy / total:6.1%} of the in-process report's CPU "
          f"({weasy:.2f} of {total:.2f} s); of the report process's CPU {weasy / rep[1]:6.1%}")
    print(f"  {runs[0]['pages']} pages, {runs[0]['bytes'] / 1024:.0f} KiB; fonts subset by {subsetter()}")
    lean = min(r["without per-horizon tables"] for r in runs)
    n_tables = runs[0]["per-horizon tables"]
    print(f"  WeasyPrint without the {n_tables} per-horizon risk and effects tables  CPU {lean:6.2f} s "
          f"(they cost {weasy - lean:.2f} s of its {weasy:.2f} s; a measurement, the report keeps them)")
    raster, fonts = (min(r[k] for r in runs) for k in ("rasterizing", "font subsetting"))
    by = subsetter()
    hb = ", done by fontTools; the HarfBuzz-subset library, when installed, does it in under 0.01 s" if "fontTools" in by else ""
    print(f"  in the way of 3 s: WeasyPrint's cost per box laid out and painted ({weasy:.2f} s, of it the "
          f"per-horizon tables {weasy - lean:.2f} s); matplotlib's per-figure cost "
          f"({cpu['figures, tables and HTML']:.2f} s with the tables and HTML, {raster:.2f} s rasterizing); "
          f"subsetting the fonts ({fonts:.2f} s{hb})")
    return total


if __name__ == "__main__":
    sys.exit(main())
