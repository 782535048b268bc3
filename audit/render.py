"""Rendering: the one jinja2 environment, report.html, report.pdf and results.xlsx.

The report model (:mod:`audit.report`) is turned into one self-contained HTML
page (inline CSS and SVG, no script, nothing fetched from anywhere). The PDF is
the same page laid out by WeasyPrint with the print style sheet; WeasyPrint may
read ``data:`` URIs and files inside the output folder and nothing else
(:class:`OutputFolderFetcher`).

Many loops: every loop needing attention gets a detail section in the HTML; the
PDF carries the first :data:`PDF_DETAIL_LIMIT` of them in work-list order and
says so. Charts are drawn only for the first :data:`PLOT_LIMIT` detail sections:
:mod:`audit.plots` computes their data (scaled coordinates, ticks, legends) and
:mod:`audit.svg` writes them as inline SVG with the title and legend as page text, once
for both the HTML and the PDF.
"""

from __future__ import annotations

import contextlib
import functools
import gc
import itertools
import math
import re
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from concurrent.futures import ProcessPoolExecutor
from typing import Any, Callable, Iterator
from urllib.parse import urlsplit

import jinja2
from markupsafe import Markup, escape

from .curves import LoopPlots
from .parallel import fork_context
from .report import STATUS_ORDER, Report, build_report
from .svg import chart_html

TEMPLATES = Path(__file__).resolve().parent.parent / "templates"
"""Folder of the report templates (top level of the repository)."""

PDF_DETAIL_LIMIT = 100
"""Most detail sections in report.pdf (work-list order); the HTML has them all."""

PLOT_LIMIT = 100
"""Detail sections with plots, in work-list order (HTML and PDF); the rest show their figures in tables."""

PDF_TABLE_LIMIT = 300
"""Most lines of the all-loops table and of the work list in report.pdf."""

PAPERS = {"a4": "A4", "letter": "letter"}

STATUS_SYMBOLS: dict[str, str] = {
    "unstable": "\u2716", "fails": "\u25b2", "marginal": "\u25c6", "invalid": "\u25cb",
    "not evaluated": "\u2013", "passes": "\u2713",
}
"""A shape per status, shown beside the word (never colour alone)."""

VERDICT_SYMBOLS: dict[str, str] = {
    "within": "\u2713", "stable": "\u2713", "near": "\u25c6", "beyond": "\u25b2", "unstable": "\u2716",
}


# ----------------------------------------------------------------------------- filters


def fmt_num(value: Any, digits: int = 3) -> str:
    """A number as text for the report.

    Parameters
    ----------
    value : Any
        None/NaN gives an en dash, infinities the infinity sign, booleans yes/no,
        text is returned as it is (the template escapes it).
    digits : int
        Significant digits. [-]
    """
    if type(value) is float:   # the common case first (same rules as below)
        if value != value:
            return "\u2013"
        a = abs(value)
        if a == math.inf:
            return "\u221e" if value > 0 else "\u2212\u221e"
        if a == 0:
            return "0"
        if a >= 10 ** digits:
            return f"{value:,.0f}".replace("-", "\u2212")
        return f"{value:.{digits}g}".replace("-", "\u2212")
    if value is None:
        return "\u2013"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "\u2013"
        if math.isinf(value):
            return "\u221e" if value > 0 else "\u2212\u221e"
        a = abs(value)
        if a == 0:
            return "0"
        if a >= 10 ** digits:
            return f"{value:,.0f}".replace("-", "\u2212")
        return f"{value:.{digits}g}".replace("-", "\u2212")
    if isinstance(value, (tuple, list)):
        return ", ".join(fmt_num(v, digits) for v in value)
    try:
        return fmt_num(float(value), digits) if not isinstance(value, str) else value
    except (TypeError, ValueError):
        return str(value)


def fmt_status(status: str) -> str:
    """Symbol and word of a status, e.g. ``'\u25b2\u00a0fails'`` (a no-break space keeps them on one line)."""
    sym = STATUS_SYMBOLS.get(status, "")
    return f"{sym}\u00a0{status}" if sym else status


def fmt_verdict(verdict: str) -> str:
    """Symbol and word of a check's verdict (joined by a no-break space)."""
    sym = VERDICT_SYMBOLS.get(verdict, "")
    return f"{sym}\u00a0{verdict}" if sym else verdict


def fmt_change(text: Any) -> str:
    """A 'before -> after' text for the page: the arrow drawn as one sign that never starts a line.

    Parameters
    ----------
    text : Any
        E.g. ``'Ms 2.29 -> 1.44'`` (results files keep the two ASCII characters); other values as
        :func:`fmt_num` gives them.
    """
    return fmt_num(text).replace(" -> ", "\u00a0\u2192 ") if isinstance(text, str) else fmt_num(text)


#: A run of more than this many non-space characters gets break opportunities (see :func:`fmt_breakable`).
LONG_RUN = 30
#: Characters between two zero-width spaces inside such a run.
BREAK_EVERY = 20
_LONG_RUN_RE = re.compile(r"\S{%d,}" % (LONG_RUN + 1))


def fmt_breakable(text: Any) -> Any:
    """Inventory or record text as escaped markup in which a long unbroken run may break.

    A run of more than :data:`LONG_RUN` non-space characters gets a zero-width space (U+200B) after every
    :data:`BREAK_EVERY` characters, so a page lays it out by cheap break opportunities instead of letting
    the renderer search every letter (WeasyPrint's cost of breaking inside one word grows with the square
    of its length). Normal words are unchanged. The text is cut first and each piece escaped after, so an
    entity is never split and markup stays inert. Markup (already safe) and non-text values pass through.

    Parameters
    ----------
    text : Any
        Text from the spreadsheet or a record (tag, area, findings, notes, file names...).
    """
    if isinstance(text, Markup) or not isinstance(text, str):
        return text
    if _LONG_RUN_RE.search(text) is None:   # the common case: nothing to cut
        return escape(text)

    def cut(m: re.Match) -> str:
        run = m.group(0)
        return "\u200b".join(run[i:i + BREAK_EVERY] for i in range(0, len(run), BREAK_EVERY))

    out, last = [], 0
    for m in _LONG_RUN_RE.finditer(text):
        out.append(str(escape(text[last:m.start()])))
        out.append(str(escape(cut(m))))
        last = m.end()
    out.append(str(escape(text[last:])))
    return Markup("".join(out))


@functools.lru_cache(maxsize=1024)
def _css(text: str) -> str:
    return "s-" + "".join(ch if ch.isalnum() else "-" for ch in text.lower())


def css_class(text: str) -> str:
    """A status or verdict word as a CSS class name.

    Parameters
    ----------
    text : str
        The word, e.g. ``unstable`` or ``not achievable by tuning``.
    """
    return _css(str(text))


# ----------------------------------------------------------------------------- rows of the long tables
# A row of a table repeated thousands of times (all loops, the work list, each detail section's tables)
# is written by one filter, with the same text the cells' own expressions gave: one call and one
# escape per row instead of one per cell.


def _h(value: Any) -> str:
    """A value as autoescape writes it: markup as it is, anything else as escaped text."""
    return str(escape(value))


def kv_rows(items: Any, digits: int | None = None) -> Markup:
    """Rows of a label/value table, one for each of ``items`` (:class:`audit.report.Item`): the label with its
    unit, the value as breakable text, or as a number of ``digits`` significant digits."""
    out = []
    for it in items:
        label = _h(it.label) + (f" [{_h(it.unit)}]" if it.unit else "")
        value = _h(fmt_breakable(it.value)) if digits is None else _h(fmt_num(it.value, digits))
        out.append(f'<tr><th scope="row">{label}</th><td>{value}</td></tr>')
    return Markup("".join(out))


def entered_rows(items: Any, per_row: int = 4) -> Markup:
    """Rows of the table of cells as entered (``items``): ``per_row`` label/value pairs a row, values to 6 digits."""
    items = list(items)
    rows = []
    for a in range(0, len(items), per_row):
        cells = "".join(f'<th scope="row">{_h(it.label)}</th><td>{_h(fmt_breakable(fmt_num(it.value, 6)))}</td>'
                        for it in items[a:a + per_row])
        rows.append(f"<tr>{cells}</tr>")
    return Markup("\n".join(rows))


_RULE_SIGNS = {"<=": "&le;", ">=": "&ge;"}


def check_row(c: Any) -> Markup:
    """A row of a loop's table of figures against their limits, for the check ``c`` (:class:`audit.report.Check`)."""
    value = ("stable" if c.value else "unstable") if c.column == "stable" else _h(fmt_num(c.value))
    limit = _h(fmt_num(c.limit)) if c.rule else ""
    return Markup(f'  <tr>\n    <th scope="row">{_h(c.figure)} <span class="col">{_h(c.column)}</span></th>\n'
                  f'    <td class="num">{value}</td>\n    <td class="rule">{_RULE_SIGNS.get(c.rule, "")}</td>\n'
                  f'    <td class="num">{limit}</td>\n    <td>{_h(c.unit)}</td>\n'
                  f'    <td class="verdict {_h(css_class(c.verdict))}">{_h(fmt_verdict(c.verdict))}</td>\n  </tr>')


def _tag_cell(tag: str, anchor: str, linked: bool) -> str:
    text = _h(fmt_breakable(tag))
    return f'<a href="#{_h(anchor)}">{text}</a>' if linked else text


def loop_row(line: Any, detail_anchors: Any) -> Markup:
    """A row of the table of all loops for ``line`` (:class:`audit.report.LoopLine`); the tag links to its
    detail section when the page has it (its anchor is in ``detail_anchors``)."""
    a = line.detail_anchor
    tag = _tag_cell(line.tag, a, bool(a) and a in detail_anchors)
    return Markup(
        f'    <tr id="{_h(line.row_anchor)}">\n      <td class="num">{_h(line.row)}</td>\n'
        f'      <td class="tag">{tag}</td>\n'
        f'      <td>{_h(fmt_breakable(line.area))}</td><td>{_h(line.criticality)}</td>\n'
        f'      <td class="status {_h(css_class(line.status))}">{_h(fmt_status(line.status))}</td>\n'
        f'      <td class="num">{_h(fmt_num(line.ms))}</td><td class="num">{_h(fmt_num(line.gm_db))}</td>'
        f'<td class="num">{_h(fmt_num(line.pm_deg))}</td>\n'
        f'      <td class="num">{_h(fmt_num(line.band_s_db))}</td><td class="num">{_h(fmt_num(line.band_required_db))}'
        f'</td>\n      <td class="reason">{_h(fmt_breakable(line.findings))}</td>\n    </tr>')


def work_row(it: Any, ranked: bool, compact: bool, detail_anchors: Any) -> Markup:
    """A row of the work list for ``it`` (:class:`audit.report.WorkItem`), ``ranked`` or in the fallback order,
    in full or ``compact`` (the executive summary); the tag links to its detail section when its anchor is in
    ``detail_anchors``."""
    first = _h(fmt_num(it.rank)) if ranked else _h(it.position)
    tail = ""
    if ranked:
        tail = f"<td>{_h(it.action)}</td>"
        if not compact:
            tail += (f'<td class="reason">{_h(fmt_change(it.expected_improvement))}</td><td>{_h(it.verdict)}</td>'
                     f'<td class="settings">{_h(it.proposal_settings)}</td>')
    return Markup(
        f'  <tr>\n    <td class="num">{first}</td>\n'
        f'    <td class="tag">{_tag_cell(it.tag, it.anchor, it.anchor in detail_anchors)}</td>\n'
        f'    <td>{_h(fmt_breakable(it.area))}</td><td>{_h(it.criticality)}</td>\n'
        f'    <td class="status {_h(css_class(it.status))}">{_h(fmt_status(it.status))}</td>\n'
        f'    <td class="reason">{_h(fmt_breakable(it.reason))}</td>\n{tail}  </tr>')


@functools.lru_cache(maxsize=4)
def environment(folder: str = str(TEMPLATES)) -> jinja2.Environment:
    """The one jinja2 environment: autoescape on for every template, strict undefined, filters registered.

    Parameters
    ----------
    folder : str
        Template folder.
    """
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(folder),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
        auto_reload=False,   # templates are read once per process, not checked on every include
    )
    env.filters.update(num=fmt_num, status=fmt_status, verdict=fmt_verdict, css=css_class,
                       change=fmt_change, brk=fmt_breakable, kv_rows=kv_rows, entered_rows=entered_rows,
                       check_row=check_row, loop_row=loop_row, work_row=work_row)
    return env


# ----------------------------------------------------------------------------- html


@dataclass(frozen=True)
class Rendered:
    """The drawings of a report, as markup ready to inline: per loop anchor, (caption, SVG) pairs."""

    loops: dict[str, tuple[tuple[str, Markup], ...]]
    status_mix: Markup | None
    trend: Markup | None
    health: dict[str, tuple[tuple[str, Markup], ...]] = field(default_factory=dict)   # loop anchor -> charts
    groups: dict[str, Markup] = field(default_factory=dict)   # group id -> generalised Nyquist chart


def render_chart(chart) -> Markup:
    """One chart (:class:`audit.plots.Chart`) as a ``<figure>`` with its ``<svg>`` element (:mod:`audit.svg`).

    The writer escapes every text of the chart, so text from the inventory (area names, tags)
    stays inert.
    """
    return Markup(chart_html(chart))


CHART_CHUNK = 25
"""Loops whose charts are drawn per task of a process pool (:func:`draw` with a pool's ``map``). [-]"""


def _loop_svgs(plots) -> tuple[tuple[str, str], ...]:
    """Charts of one loop as (caption, SVG text): chart data and the SVG writer, no matplotlib."""
    from .plots import loop_charts

    return tuple((c.caption, chart_html(c)) for c in loop_charts(plots))


def _loops_svgs(run: list) -> list[tuple[tuple[str, str], ...]]:
    """Charts of a run of loops (a pool's task): :func:`_loop_svgs` of each."""
    return [_loop_svgs(plots) for plots in run]


def draw(report: Report, mapper: Callable = map) -> Rendered:
    """Draw the charts of the report: every detail section that carries plot data, the summary charts.

    Parameters
    ----------
    report : Report
        The report model.
    mapper : callable
        ``map`` or a process pool's ``map``, applied over the loops with plot data.
    """
    from . import plots

    todo = [d for d in report.details if d.plots is not None]
    runs = [[d.plots for d in todo[a:a + CHART_CHUNK]] for a in range(0, len(todo), CHART_CHUNK)]
    pending = mapper(_loops_svgs, runs)   # with a pool: drawn in its workers while the charts below are drawn here
    mix = None
    if report.by_area:
        mix = render_chart(plots.status_mix(report.by_area, report.statuses))
    trend = None
    h = report.history
    if h is not None and len(h.trend_dates) >= 1 and h.trend:
        trend = render_chart(plots.status_trend(h.trend_dates, h.trend))
    from .health_charts import health_svgs   # drawn here, or already by the per-loop plant-data task
    health = {d.anchor: health_svgs(d.health) for d in report.details if d.health is not None}
    from .multiloop.report import group_nyquist_chart
    groups = {g.gid: render_chart(group_nyquist_chart(g, f"gnyq-{g.gid.lower()}"))
              for g in getattr(report, "groups", ()) if g.evaluated and g.W.size}
    loops = {}
    for d, svgs in zip(todo, itertools.chain.from_iterable(pending)):
        # written by audit.svg, every text escaped
        loops[d.anchor] = tuple((caption, Markup(svg)) for caption, svg in svgs)
    return Rendered(loops, mix, trend, health, groups)


SECTION_CHUNK = 100
"""Detail sections rendered per task of a process pool (:func:`render_html` with a pool's ``map``). [-]"""


def _loop_sections(task: tuple) -> list[str]:
    """Detail sections of a run of loops (``loop.html.j2``), each as the text the page includes (a pool's task).

    Parameters
    ----------
    task : tuple
        (details, their charts {anchor: charts}, their loop-health charts {anchor: charts},
        anchors of every detail section of the page, the PDF's variant or not).
    """
    details, loops, health, anchors, for_print = task
    template = environment().get_template("loop.html.j2")
    drawings = Rendered(loops, None, None, health)
    return [template.render(d=d, drawings=drawings, detail_anchors=anchors, for_print=for_print) for d in details]


_NO_ARRAYS = LoopPlots("", None)
"""What a detail section sent to a worker carries for its plot data (``loop.html.j2`` asks only whether it
has any; the charts go beside it, drawn)."""


def _sections(details, rendered: Rendered, anchors: frozenset, for_print: bool, mapper: Callable) -> Iterator[Markup]:
    """The detail sections of the page, in order, rendered in runs of :data:`SECTION_CHUNK` by ``mapper``.

    With a pool's ``map`` the runs are handed to its workers at once and rendered while the caller
    renders the rest of the page (the page reads the sections when it reaches them); each section is
    the same text as ``{% include "loop.html.j2" %}`` in the page would give.
    """
    tasks = []
    for a in range(0, len(details), SECTION_CHUNK):
        run = details[a:a + SECTION_CHUNK]
        keys = [d.anchor for d in run]
        # the section reads only whether plots exist: their arrays are not sent to a worker
        run = tuple(d if d.plots is None else replace(d, plots=_NO_ARRAYS) for d in run)
        tasks.append((run, {k: rendered.loops[k] for k in keys if k in rendered.loops},
                      {k: rendered.health[k] for k in keys if k in rendered.health}, anchors, for_print))
    # written by the autoescaping loop template
    return (Markup(text) for texts in mapper(_loop_sections, tasks) for text in texts)


def render_html(report: Report, rendered: Rendered, *, paper: str = "a4", for_print: bool = False,
                mapper: Callable = map) -> str:
    """The report as one self-contained HTML page.

    Parameters
    ----------
    report : Report
        The report model.
    rendered : Rendered
        Its drawings (:func:`draw`).
    paper : str
        ``a4`` or ``letter`` (the page size of the print style sheet).
    for_print : bool
        The PDF's variant: at most :data:`PDF_DETAIL_LIMIT` detail sections and
        :data:`PDF_TABLE_LIMIT` lines per long table, each cut said in the text.
    mapper : callable
        ``map`` or a process pool's ``map``: renders the detail sections (:func:`_sections`); the page
        is the same either way.

    Returns
    -------
    str
    """
    return "".join(_html_pieces(report, rendered, paper=paper, for_print=for_print, mapper=mapper))


def write_html(path: Path, report: Report, rendered: Rendered, *, paper: str = "a4", mapper: Callable = map) -> Path:
    """Write the page to ``path`` piece by piece, as the template gives them (UTF-8).

    The same bytes as ``path.write_text(render_html(...), encoding="utf-8")`` without the whole page,
    and its encoded copy, in memory at once (with plant data, tens of MB per thousand loops).

    Parameters
    ----------
    path : Path
        The file written.
    report, rendered, paper, mapper
        As :func:`render_html` (the screen page: ``for_print`` false).

    Returns
    -------
    Path
    """
    with open(path, "w", encoding="utf-8") as fh:
        for piece in _html_pieces(report, rendered, paper=paper, mapper=mapper):
            fh.write(piece)
    return path


def _html_pieces(report: Report, rendered: Rendered, *, paper: str = "a4", for_print: bool = False,
                 mapper: Callable = map) -> Iterator[str]:
    """:func:`render_html`'s page in the pieces the template gives (its parameters)."""
    details = report.details
    table_limit = None
    if for_print:
        details = details[:PDF_DETAIL_LIMIT]
        table_limit = PDF_TABLE_LIMIT
    anchors = frozenset(d.anchor for d in details)
    return environment().get_template("base.html.j2").generate(
        r=report,
        details=details,
        sections=_sections(details, rendered, anchors, for_print, mapper),
        drawings=rendered,
        paper=PAPERS.get(paper, "A4"),
        for_print=for_print,
        table_limit=table_limit,
        detail_anchors=anchors,
        status_order=STATUS_ORDER,
    )


# ----------------------------------------------------------------------------- pdf


@dataclass(frozen=True)
class OutputFolderFetcher:
    """A WeasyPrint URL fetcher that reads ``data:`` URIs and files inside ``root``, and refuses all else."""

    root: Path

    def __call__(self, url: str, timeout: float = 10, ssl_context: Any = None, http_headers: Any = None) -> dict:
        from urllib.request import url2pathname   # here: its import (http, ssl, email) is for the PDF only

        from weasyprint.urls import default_url_fetcher

        scheme = urlsplit(url).scheme.lower()
        if scheme == "data":
            return default_url_fetcher(url, timeout=timeout)
        if scheme == "file":
            path = Path(url2pathname(urlsplit(url).path)).resolve()
            root = self.root.resolve()
            if path.is_relative_to(root) and path.is_file():
                return {"string": path.read_bytes(), "redirected_url": url}
        raise ValueError(f"refused to fetch {url!r}: the report reads only data: URIs and its output folder")


@contextlib.contextmanager
def _cycle_collector_paused() -> Iterator[None]:
    """Pause Python's cyclic garbage collector while WeasyPrint lays out the page (restored after).

    Layout allocates millions of short-lived objects; each full collection would walk every
    live object of the run again (about a fifth of the PDF's time on the sample site). The
    objects alive before are frozen out of collection, and one collection runs afterwards.
    """
    was_enabled = gc.isenabled()
    gc.collect()
    gc.freeze()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()
        gc.unfreeze()
        gc.collect()


@contextlib.contextmanager
def _cycle_collector_held() -> Iterator[None]:
    """Hold off Python's cyclic garbage collector while the report is built and rendered (restored after).

    Building the report of a large inventory allocates many small objects; each full collection would
    walk every object of the run (models, results, records) again. The objects alive before are frozen
    out of collection; unlike :func:`_cycle_collector_paused`, no collection is forced before or after
    (the report makes little cyclic garbage, collected by the next ordinary collection).
    """
    was_enabled = gc.isenabled()
    gc.freeze()
    gc.disable()
    try:
        yield
    finally:
        if was_enabled:
            gc.enable()
        gc.unfreeze()


def write_pdf(html: str, path: Path, out_dir: Path) -> Path:
    """Lay out ``html`` with WeasyPrint into ``path``.

    Parameters
    ----------
    html : str
        The print variant of the page (:func:`render_html` with ``for_print``).
    path : Path
        The PDF to write.
    out_dir : Path
        The output folder: the base URL and the only place files may be read from.
    """
    import weasyprint

    with _cycle_collector_paused():
        doc = weasyprint.HTML(string=html, base_url=str(out_dir.resolve()) + "/",
                              url_fetcher=OutputFolderFetcher(out_dir))
        doc.write_pdf(path)
    return path


# ----------------------------------------------------------------------------- outputs


_FORK = fork_context()
"""The start method of the report's pool: fork (workers inherit the compiled templates and the run), else None."""


@contextlib.contextmanager
def _pool(jobs: int) -> Iterator[ProcessPoolExecutor | None]:
    """A process pool of ``jobs`` workers, started at once, or None with one job.

    The workers are forked now (before the caller starts any thread of its own) where the platform forks;
    elsewhere they are started by the platform's default method.
    """
    if jobs is None or jobs <= 1:
        yield None
        return
    with ProcessPoolExecutor(max_workers=jobs, mp_context=_FORK) as ex:
        ex.submit(int)   # with fork, the first task starts every worker now
        yield ex


def _map_of(ex: ProcessPoolExecutor | None) -> Callable:
    """``map``, or the pool's ``map`` of one task per item (the two step batches run side by side)."""
    return map if ex is None else functools.partial(ex.map, chunksize=1)


@contextlib.contextmanager
def _mapper(jobs: int) -> Iterator[Callable]:
    """``map``, or a process pool's ``map`` when more than one job is allowed (:func:`_pool`).

    Parameters
    ----------
    jobs : int
        Worker processes; 1 or None: ``map`` in this process. [-]
    """
    with _pool(jobs) as ex:
        yield _map_of(ex)


def _ready_for_workers() -> None:
    """Compile the templates of a detail section and import the chart modules, before a pool's workers fork.

    Each worker then inherits them instead of compiling ``loop.html.j2`` and the templates it includes and
    importing the chart code again (a fixed cost per worker, paid before its first task). The page's own
    templates are compiled here too (the page is rendered in this process).
    """
    from jinja2 import meta

    env = environment()
    env.get_template("base.html.j2")
    todo, seen = ["loop.html.j2"], set()
    while todo:
        name = todo.pop()
        if name in seen:
            continue
        seen.add(name)
        env.get_template(name)
        source = env.loader.get_source(env, name)[0]
        todo.extend(n for n in meta.find_referenced_templates(env.parse(source)) if n)
    from . import health_charts, plots  # noqa: F401  (imported for the workers)
    from .curves import _step_source
    from .multiloop import report as _groups  # noqa: F401
    _step_source()


def write_outputs(audit, beside: Callable[[], Any] | None = None) -> dict[str, Path]:
    """Write report.html, report.pdf (unless ``options.pdf`` is false) and results.xlsx.

    With more than one job, a process pool serves the report (step batches, charts, detail sections); where
    the platform forks, its workers also write ``beside`` and results.xlsx, each as one task: ``beside``
    queued right after the step batches, the workbook once the report model is built. This process builds
    and renders the page meanwhile and does none of their work (no thread of it competes with the page for
    the interpreter). Otherwise ``beside`` runs first and results.xlsx after the page. The files are the
    same either way.

    Parameters
    ----------
    audit : Audit
        A finished run.
    beside : callable, optional
        Writes other files of the run (the caller's results.csv and results.json); called once with no
        argument (with a pool, in a worker, which inherited it at fork time). An exception it raises is
        raised here, once the page is written.

    Returns
    -------
    dict
        File name -> path written, in ``audit.options.out_dir``.
    """
    global _SHARED
    out = Path(audit.options.out_dir)
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    limit = getattr(audit.options, "plot_limit", PLOT_LIMIT)
    jobs = audit.options.jobs
    pooled = jobs is not None and jobs > 1
    beside_pool = pooled and _FORK is not None   # the workers inherit the run: they write the files
    if beside is not None and not beside_pool:
        beside()
        t0 = time.perf_counter()
    written: dict[str, Path] = {}
    xlsx_path = out / "results.xlsx"
    with _cycle_collector_held():
        _ready_for_workers()   # compiled and imported before the pool's workers are forked
        _SHARED = (audit, beside)   # inherited by the forked workers (:func:`_tables_task`, :func:`_book_task`)
        try:
            with _pool(jobs) as ex:
                pool_map = _map_of(ex)
                tables: list = []

                def queue_tables() -> None:
                    if beside_pool and beside is not None and not tables:
                        tables.append(ex.submit(_tables_task))

                def mapper(fn: Callable, *items: Any) -> Any:
                    pending = pool_map(fn, *items)
                    queue_tables()   # after the step batches, the first tasks
                    return pending

                try:
                    report = build_report(audit, plot_limit=limit, mapper=mapper)
                finally:
                    queue_tables()   # also when no step batch was started, or the build failed
                book = ex.submit(_book_task, _book_part(report), xlsx_path) if beside_pool else None
                rendered = draw(report, mapper=mapper)
                written["report.html"] = write_html(out / "report.html", report, rendered,
                                                    paper=audit.options.paper, mapper=mapper)
                audit.timings["report.html"] = time.perf_counter() - t0
                t0 = time.perf_counter()
                for done in tables:
                    done.result()
                if book is not None:
                    written["results.xlsx"] = book.result()
                    audit.timings["results.xlsx"] = time.perf_counter() - t0   # the wait after the page
        finally:
            _SHARED = None
    if audit.options.pdf:
        t0 = time.perf_counter()
        pdf_html = render_html(report, rendered, paper=audit.options.paper, for_print=True)
        written["report.pdf"] = write_pdf(pdf_html, out / "report.pdf", out)
        audit.timings["report.pdf"] = time.perf_counter() - t0
    if "results.xlsx" not in written:
        from .xlsx_out import write_results_xlsx   # here: with the pool's workers, this process never needs it

        t0 = time.perf_counter()
        written["results.xlsx"] = write_results_xlsx(audit, report, xlsx_path)
        audit.timings["results.xlsx"] = time.perf_counter() - t0
    else:
        written["results.xlsx"] = written.pop("results.xlsx")   # listed last, as written before
    return written


_SHARED: tuple | None = None
"""(audit, beside) of the running :func:`write_outputs`, for the pool's workers (they inherit it at fork time)."""


def _tables_task() -> None:
    """A worker's task: the caller's ``beside`` (results.csv and results.json) of the run shared at fork time."""
    _SHARED[1]()


def _book_part(report: Report) -> Report:
    """What results.xlsx reads of the report model (cover, tallies, work list, invalid rows): the report
    without its detail sections, loop lines and other page-only parts, cheap to send to a worker."""
    return replace(report, details=(), loops=(), history=None, glossary=(), health=None, groups=(),
                   plant_data=None)


def _book_task(report: Report, path: Path) -> Path:
    """A worker's task: results.xlsx of the run shared at fork time, with ``report`` (:func:`_book_part`)."""
    from .xlsx_out import write_results_xlsx

    return write_results_xlsx(_SHARED[0], report, path)
