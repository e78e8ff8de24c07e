"""One self-contained HTML page about one or more campaigns.

The page embeds every image as a ``data:`` URI and carries its CSS and a few lines of script
inline, so it can be mailed, archived or opened offline: it refers to nothing outside itself.

The module has three parts:

* reading (I/O): :func:`gather_campaign` brings a campaign's analysis up to date (running
  :func:`ionwell.analysis.tables.analyse` when ``analysis/analysis.json`` is missing or older than the
  ledger) and collects everything the page shows into a :class:`CampaignReport`;
* comparison figures: :func:`comparison_figures` takes the numbers of several campaigns from
  their tables and has :mod:`ionwell.analysis.plots.charts` draw them in memory (no files); this
  module draws nothing itself;
* HTML builders: pure functions from those models to strings (:func:`render_page` and the
  ``render_*`` helpers below it).

:func:`write_report` ties them together and writes the file.
"""

from __future__ import annotations

import base64
import csv
import html
import io
import json
import logging
import re
import struct
from collections.abc import Sequence
from datetime import datetime
from pathlib import Path

from pydantic import BaseModel, Field, ValidationError

import ionwell
from ionwell.analysis.plots import charts
from ionwell.analysis.tables import AnalysisSummary, analyse, is_current
from ionwell.audit.status import CampaignStatus, campaign_status
from ionwell.errors import IonwellError
from ionwell.science import energetics
from ionwell.science.checks import Finding
from ionwell.store.campaign import CampaignPaths, atomic_write_text, load_frozen
from ionwell.store.paths import StepPaths, step_label

__all__ = [
    "CampaignReport",
    "Figure",
    "StepFindings",
    "Table",
    "analysis_findings",
    "comparison_figures",
    "default_output",
    "figure_caption",
    "gather_campaign",
    "render_page",
    "write_report",
]

log = logging.getLogger("ionwell.analysis.report")

#: Captions of the plots ionwell's analysis writes; any other image is captioned by its stem.
FIGURE_CAPTIONS: dict[str, str] = {
    "hull.png": "Formation energy per step against x, with the lower convex hull",
    "voltage.png": "Voltage steps between neighbouring hull vertices",
    "occupancy_map.png": "Where the guests sit: occupancy map of the inserted guests",
    "stacking.png": "Layer stacking of the host along the series",
    "rim.png": "Guests at the rim of the particle and in its interior, step by step",
    "charges.png": "Charge transfer between guests and host along the series",
    "dos.png": "Electronic density of states, each step against its own frontier level",
    "filling.png": "Where the guests went: filling sequence, side and top views",
    # the per-step structure views (analysis/structures/step_NNNN.png), by their folder
    "structures/": "Side and top views of the structure; guests coloured by where they sit, "
    "those placed in this step outlined",
}

#: The folder (inside analysis/) of the per-step structure views.
STRUCTURES_FOLDER = "structures"

#: Captions of the tables ionwell's analysis writes; any other table is captioned by its stem.
TABLE_CAPTIONS: dict[str, str] = {
    "energetics.csv": "Energetics per step: energy, formation energy, distance to the hull",
    "voltage.csv": "Voltage steps between hull vertices",
    "layers.csv": "Galleries per step: spacing, guests, registry, stage",
    "stacking.csv": "Layer stacking per step",
    "sites.csv": "Guest sites: rim or interior, nearest guest–guest distances",
    "charges.csv": "Charge transfer per step: guest charge, electrons gained by the host",
    "electronic.csv": "Electronic structure per step: Fermi level or HOMO and its shift",
    "dos.csv": "Electronic density of states",
}

#: Tables with more rows than this are folded into a ``<details>`` element.
FOLD_ROWS = 12

#: At most this many rows of one table are written into the page.
MAX_ROWS = 400

MODEL_NOTE = (
    "Energies, formation energies and voltages in this report are results of the configured "
    "electronic-structure method on the modelled structures. They are not measurements and not "
    "safety data for real cells."
)

_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


# ---------------------------------------------------------------------------------------------
# models


class Figure(BaseModel):
    """One embedded PNG image."""

    name: str
    caption: str
    png_base64: str
    width: int
    height: int


class Table(BaseModel):
    """One CSV table, every cell as written in the file."""

    name: str
    caption: str
    header: list[str]
    rows: list[list[str]]


class StepFindings(BaseModel):
    """The checks of one step, as recorded in its ``checks.json``."""

    step: int
    findings: list[Finding] = Field(default_factory=list)
    note: str | None = None  # why the findings could not be read


class CampaignReport(BaseModel):
    """Everything the page shows about one campaign."""

    root: str
    name: str
    description: str = ""
    host_formula: str
    guest: str
    charge_mode: str
    engine: str
    status: CampaignStatus
    summary: AnalysisSummary
    findings: list[StepFindings]
    figures: list[Figure]
    tables: list[Table]
    notes: list[str] = Field(default_factory=list)
    config_text: str

    def table(self, name: str) -> Table | None:
        """The table read from the analysis file ``name``, if there is one."""
        return next((t for t in self.tables if t.name == name), None)


# ---------------------------------------------------------------------------------------------
# reading (I/O)


def default_output(campaigns: Sequence[str | Path]) -> Path:
    """Where the report goes without ``-o``: the campaign's analysis folder, or ./report.html."""
    if len(campaigns) == 1:
        return Path(campaigns[0]) / "analysis" / "report.html"
    return Path.cwd() / "report.html"


def _load_summary(paths: CampaignPaths) -> AnalysisSummary:
    """The analysis summary, brought up to date first when the ledger is newer."""
    f = paths.root / "analysis" / "analysis.json"
    if not is_current(paths.root):
        log.info("%s: analysis missing or older than its inputs; analysing", paths.root)
        return analyse(paths.root)
    try:
        return AnalysisSummary.model_validate_json(f.read_text())
    except (OSError, ValidationError) as err:
        log.warning("%s: unreadable (%s); analysing again", f, type(err).__name__)
        return analyse(paths.root)


def _png_size(data: bytes) -> tuple[int, int] | None:
    """Width and height from the IHDR chunk, or None if ``data`` is not a PNG."""
    if len(data) < 24 or not data.startswith(_PNG_SIGNATURE) or data[12:16] != b"IHDR":
        return None
    w, h = struct.unpack(">II", data[16:24])
    return (w, h) if w > 0 and h > 0 else None


def _figure_from_bytes(name: str, caption: str, data: bytes) -> Figure | None:
    size = _png_size(data)
    if size is None:
        return None
    return Figure(
        name=name,
        caption=caption,
        png_base64=base64.b64encode(data).decode("ascii"),
        width=size[0],
        height=size[1],
    )


def _read_table(path: Path, caption: str) -> Table:
    rows = list(csv.reader(io.StringIO(path.read_text())))
    header, body = (rows[0], rows[1:]) if rows else ([], [])
    return Table(name=path.name, caption=caption, header=header, rows=body)


def figure_caption(rel: str) -> str:
    """The caption of the analysis image at ``rel`` (a path relative to analysis/)."""
    path = Path(rel)
    if rel in FIGURE_CAPTIONS:
        return FIGURE_CAPTIONS[rel]
    if path.name in FIGURE_CAPTIONS:
        return FIGURE_CAPTIONS[path.name]
    folder = f"{path.parent.as_posix()}/"
    if folder in FIGURE_CAPTIONS:
        m = re.fullmatch(r"step_0*(\d+)", path.stem)
        where = f"Step {m.group(1)}: " if m else ""
        return where + FIGURE_CAPTIONS[folder]
    return path.stem


def _analysis_files(folder: Path, summary: AnalysisSummary) -> tuple[list[Path], list[str]]:
    """The files to show, in this order: the filling-sequence figure, the last step's structure
    view, the other files the summary lists (in its order), then any other PNG or CSV directly
    in the folder (by name; subfolders are not scanned). Of the per-step structure views only
    the last is shown. Also the notes on listed files that are missing or of unknown kind."""
    notes = []
    chosen: list[Path] = []
    seen: set[str] = set()
    views = set(summary.structures)
    wanted = [summary.filling] if summary.filling else []
    wanted += summary.structures[-1:]
    wanted += [f for f in summary.files if f not in views]
    for name in wanted:
        rel = Path(name).as_posix()
        if rel in seen:
            continue
        seen.add(rel)
        p = folder / rel
        if p.suffix.lower() not in (".png", ".csv"):
            log.debug("%s: not an image or table; not shown", p)
            continue
        if not p.is_file():
            notes.append(f"{name} is listed in analysis.json but missing from {folder}")
            continue
        chosen.append(p)
    seen |= views
    extra = sorted(
        p
        for p in folder.iterdir()
        if p.is_file() and p.suffix.lower() in (".png", ".csv") and p.name not in seen
    )
    return chosen + extra, notes


def _step_findings(paths: CampaignPaths, steps: Sequence[int]) -> list[StepFindings]:
    out = []
    for step in steps:
        f = StepPaths(paths.step(step)).checks
        if not f.is_file():
            out.append(StepFindings(step=step, note=f"no checks.json in steps/{step_label(step)}"))
            continue
        try:
            items = [Finding.model_validate(x) for x in json.loads(f.read_text())]
        except (OSError, ValueError, TypeError, ValidationError) as err:
            log.warning("%s: unreadable findings (%s)", f, type(err).__name__)
            out.append(StepFindings(step=step, note=f"{f.name} of this step is unreadable"))
            continue
        out.append(StepFindings(step=step, findings=items))
    return out


def _engine_label(engine) -> str:
    """The engine kind with its method, e.g. ``pyscf (lda,vwn / sto-3g)``."""
    parts = [str(getattr(engine, k)) for k in ("xc", "basis") if getattr(engine, k, None)]
    if not parts and getattr(engine, "method", None):
        parts = [str(engine.method)]
    detail = " / ".join(parts)
    return f"{engine.kind} ({detail})" if detail else str(engine.kind)


def _host_formula(paths: CampaignPaths) -> str:
    from ase.io import read

    try:
        return read(paths.host).get_chemical_formula(mode="hill")
    except Exception as err:  # noqa: BLE001 - any unreadable host only costs the formula
        log.warning("%s: host not readable (%s)", paths.host, err)
        return "?"


def gather_campaign(root: str | Path) -> CampaignReport:
    """Collect everything the report shows about the campaign in ``root``.

    Runs the analysis first when it is missing or older than the ledger (a running campaign can
    be reported). Raises :class:`IonwellError` with one clear message for a folder that is not a
    campaign or has no finished step.
    """
    root = Path(root)
    if not root.is_dir():
        raise IonwellError(f"{root}: no such campaign folder")
    paths = CampaignPaths(root.resolve())
    campaign = load_frozen(paths)
    summary = _load_summary(paths)
    status = campaign_status(paths.root)
    folder = paths.root / "analysis"
    files, notes = _analysis_files(folder, summary)
    figures: list[Figure] = []
    tables: list[Table] = []
    for p in files:
        rel = p.relative_to(folder).as_posix()
        if p.suffix.lower() == ".png":
            fig = _figure_from_bytes(rel, figure_caption(rel), p.read_bytes())
            if fig is None:
                notes.append(f"{rel} is not a PNG image; left out")
            else:
                figures.append(fig)
        else:
            try:
                tables.append(_read_table(p, TABLE_CAPTIONS.get(p.name, p.stem)))
            except (OSError, UnicodeDecodeError, csv.Error) as err:
                notes.append(f"{p.name} could not be read as CSV ({type(err).__name__}); left out")
    for n in notes:
        log.warning("%s: %s", paths.root, n)
    return CampaignReport(
        root=str(paths.root),
        name=campaign.name,
        description=campaign.description,
        host_formula=_host_formula(paths),
        guest=campaign.guest.element,
        charge_mode=campaign.guest.charge_mode,
        engine=_engine_label(campaign.engine),
        status=status,
        summary=summary,
        findings=_step_findings(paths, [r.step for r in status.rows]),
        figures=figures,
        tables=tables,
        notes=notes,
        config_text=paths.config.read_text(),
    )


def write_report(campaigns: Sequence[str | Path], output: str | Path | None = None) -> Path:
    """Write the HTML report of ``campaigns`` and return its path."""
    if not campaigns:
        raise IonwellError("report: name at least one campaign folder")
    reports = [gather_campaign(c) for c in campaigns]
    figures: list[Figure] = []
    notes: list[str] = []
    if len(reports) > 1:
        figures, notes = comparison_figures(reports)
    out = Path(output) if output is not None else default_output(campaigns)
    if out.is_dir():
        raise IonwellError(f"{out}: is a folder; give a file name for the report")
    stamp = datetime.now().astimezone().isoformat(timespec="seconds")
    atomic_write_text(out, render_page(reports, figures, notes, generated=stamp))
    log.debug("report of %d campaign(s) written to %s", len(reports), out)
    return out


# ---------------------------------------------------------------------------------------------
# comparison figures: the numbers (drawn by ionwell.analysis.plots.charts, in memory)


def _floats(table: Table | None, column: str) -> list[float | None]:
    if table is None or column not in table.header:
        return []
    i = table.header.index(column)
    out: list[float | None] = []
    for row in table.rows:
        try:
            out.append(float(row[i]))
        except (IndexError, ValueError):
            out.append(None)
    return out


def _png_figure(data: bytes, name: str, caption: str) -> Figure:
    made = _figure_from_bytes(name, caption, data)
    assert made is not None  # the charts write PNG
    return made


def _points(rep: CampaignReport) -> list[tuple[float, float, bool]]:
    """``(x, formation energy eV, on the hull)`` of every step with both numbers."""
    t = rep.table("energetics.csv")
    xs, efs, hull = _floats(t, "x"), _floats(t, "formation_eV"), _floats(t, "on_hull")
    return [
        (x, e, bool(h))
        for x, e, h in zip(xs, efs, hull or [0.0] * len(xs), strict=False)
        if x is not None and e is not None
    ]


def _voltage_steps(rep: CampaignReport) -> list[tuple[float, float, float]]:
    """``(x_from, x_to, voltage V)`` of every complete row of the campaign's voltage table."""
    t = rep.table("voltage.csv")
    return [
        (a, b, v)
        for a, b, v in zip(
            _floats(t, "x_from"), _floats(t, "x_to"), _floats(t, "voltage_V"), strict=False
        )
        if a is not None and b is not None and v is not None
    ]


def comparison_figures(reports: Sequence[CampaignReport]) -> tuple[list[Figure], list[str]]:
    """Formation energy against x (with each hull) and the voltage profiles of several
    campaigns, one style per campaign (drawn by :mod:`ionwell.analysis.plots.charts`); and
    notes on campaigns left out of them."""
    notes: list[str] = []
    compared: list[charts.ComparedCampaign] = []
    for slot, rep in enumerate(reports):
        pts = _points(rep)
        if not pts:
            notes.append(
                f"{rep.name}: no formation energies (no guest reference in its config); "
                "left out of the comparison plots"
            )
            continue
        compared.append(charts.ComparedCampaign(rep.name, slot, pts, _voltage_steps(rep)))
    figures: list[Figure] = []
    if not compared:
        notes.append("no campaign has formation energies: the comparison plots are not drawn")
        return figures, notes
    figures.append(
        _png_figure(
            charts.formation_comparison(compared),
            "compare_formation.png",
            "Formation energy against x, hull drawn",
        )
    )
    for c in compared:
        if not c.voltage:
            notes.append(f"{c.name}: fewer than two hull vertices, so no voltage step to plot")
    if any(c.voltage for c in compared):
        figures.append(
            _png_figure(
                charts.voltage_comparison(compared),
                "compare_voltage.png",
                "Voltage step profile against x",
            )
        )
    return figures, notes


# ---------------------------------------------------------------------------------------------
# HTML builders (pure)

_CSS = """
:root { --ink: #1f2933; --muted: #616e7c; --line: #d9dee4; --soft: #f4f6f8; --accent: #2f6690; }
* { box-sizing: border-box; }
body { margin: 0; color: var(--ink); background: #fff;
       font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, Helvetica, Arial, sans-serif; }
main { max-width: 1080px; margin: 0 auto; padding: 1.5rem 1.5rem 4rem; }
h1 { font-size: 1.7rem; margin: 0.2rem 0 0.4rem; }
h2 { font-size: 1.35rem; margin: 2.6rem 0 0.6rem; padding-bottom: 0.25rem;
     border-bottom: 2px solid var(--accent); }
h3 { font-size: 1.08rem; margin: 1.8rem 0 0.5rem; color: var(--accent); }
a { color: var(--accent); }
p.meta, .muted { color: var(--muted); }
nav.toc { background: var(--soft); border: 1px solid var(--line); border-radius: 6px;
          padding: 0.6rem 1.2rem; margin: 1rem 0 1.5rem; }
nav.toc ul { margin: 0.2rem 0; padding-left: 1.2rem; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: 0.15rem 1rem;
           margin: 0.6rem 0; }
dl.facts dt { color: var(--muted); }
dl.facts dd { margin: 0; }
.note { border-left: 4px solid var(--line); background: var(--soft); padding: 0.5rem 0.9rem;
        margin: 0.8rem 0; }
.note.caution { border-left-color: #c77d12; background: #fdf6ea; }
.note.model { border-left-color: var(--accent); }
.table-wrap { overflow-x: auto; margin: 0.4rem 0 1rem; }
table { border-collapse: collapse; font-size: 0.88rem; }
th, td { padding: 0.25rem 0.6rem; border-bottom: 1px solid var(--line); text-align: left;
         vertical-align: top; }
th { background: var(--soft); font-weight: 600; white-space: nowrap; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tbody tr:hover { background: #fafbfc; }
.sev { display: inline-block; padding: 0 0.45rem; border-radius: 3px; font-size: 0.8rem; }
.sev-error { background: #fbe3e3; color: #8a1c1c; }
.sev-warning { background: #fdf0d5; color: #7a4b00; }
.sev-info { background: #e4eef7; color: #1d4f7a; }
figure { margin: 1rem 0 1.6rem; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--line); border-radius: 4px; }
figcaption { color: var(--muted); font-size: 0.9rem; margin-top: 0.3rem; }
details { margin: 0.4rem 0 1rem; }
details > summary { cursor: pointer; color: var(--accent); }
pre { background: var(--soft); border: 1px solid var(--line); border-radius: 4px;
      padding: 0.8rem; overflow-x: auto; font-size: 0.85rem; }
footer { margin-top: 3rem; color: var(--muted); font-size: 0.85rem; }
@media print { nav.toc { display: none; } details { display: block; } }
"""

# Counts the images that decoded, once the page has loaded (no network use).
_SCRIPT = """
window.addEventListener("load", function () {
  var images = Array.prototype.slice.call(document.images);
  var loaded = images.filter(function (im) { return im.complete && im.naturalWidth > 0; });
  document.body.dataset.imagesLoaded = String(loaded.length);
  document.body.dataset.imagesTotal = String(images.length);
});
"""

_NUMBER = re.compile(r"^[-+]?(\d+\.?\d*|\.\d+)([eE][-+]?\d+)?$")


def _e(text: object) -> str:
    return html.escape(str(text), quote=True)


def anchor(text: str) -> str:
    """A readable id for ``text`` (lower case, letters, digits and hyphens)."""
    slug = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")
    return slug or "section"


def _num(v: float | int | None, spec: str) -> str:
    return "–" if v is None else format(v, spec)


def render_table(header: Sequence[str], rows: Sequence[Sequence[object]]) -> str:
    """A plain HTML table; cells that look like numbers are right-aligned."""
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = []
    for row in rows:
        cells = []
        for c in row:
            s = str(c)
            cls = ' class="num"' if _NUMBER.match(s.strip()) else ""
            cells.append(f"<td{cls}>{_e(s)}</td>")
        body.append("<tr>" + "".join(cells) + "</tr>")
    return (
        f'<div class="table-wrap"><table><thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(body)}</tbody></table></div>"
    )


def render_figure(fig: Figure) -> str:
    """An embedded image with its caption."""
    return (
        f'<figure><img src="data:image/png;base64,{fig.png_base64}" alt="{_e(fig.caption)}" '
        f'width="{fig.width}" height="{fig.height}">'
        f'<figcaption>{_e(fig.caption)} <span class="muted">({_e(fig.name)})</span>'
        "</figcaption></figure>"
    )


def render_csv_table(table: Table) -> str:
    """A CSV table with its caption; long ones folded into ``<details>``."""
    shown = table.rows[:MAX_ROWS]
    cut = ""
    if len(table.rows) > MAX_ROWS:
        cut = f'<p class="muted">first {MAX_ROWS} of {len(table.rows)} rows shown</p>'
    inner = render_table(table.header, shown) + cut
    title = f'{_e(table.caption)} <span class="muted">({_e(table.name)})</span>'
    if len(table.rows) > FOLD_ROWS:
        return f"<details><summary>{title} — {len(table.rows)} rows</summary>{inner}</details>"
    return f"<p><strong>{title}</strong></p>{inner}"


def render_status(st: CampaignStatus) -> str:
    """The status table (one row per finished step) and the campaign's state.

    E_ins is the energy of inserting the step's new guests against the guest's chemical
    potential μ, eV per guest; without μ a note says what it needs.
    """
    header = [
        "step", f"{st.guest} in", "energy / eV", "E_ins / eV per guest", "SCF it",
        "next site / V", "time / s", "job", "outcome", "findings",
    ]  # fmt: skip
    rows = [
        [
            r.step, r.guests, _num(r.energy, ".6f"), _num(r.insertion_energy, ".4f"),
            _num(r.scf_iterations, "d"), _num(r.site_potential, ".3f"), f"{r.wall_time:.1f}",
            r.job_id or "–", r.outcome, r.findings if r.findings != "-" else "–",
        ]
        for r in st.rows
    ]  # fmt: skip
    parts = [render_table(header, rows) if rows else '<p class="muted">no finished step yet</p>']
    if st.mu is None:
        parts.append(
            '<p class="muted">E_ins (energy of inserting each new guest against the guest\'s '
            "chemical potential μ) needs analysis.reference; it stays blank until the analysis "
            "has established μ.</p>"
        )
    facts = [("state", st.state)]
    if st.mu is not None:
        source = f" ({st.mu_source})" if st.mu_source else ""
        facts.append(("E_ins against", f"μ = {st.mu:.6f} eV per guest{source}"))
    if st.detail:
        facts.append(("detail", st.detail))
    if st.running_job:
        facts.append(("running job", st.running_job))
    if st.steps_per_day is not None:
        facts.append(("pace", f"{st.steps_per_day:g} steps per day so far"))
    if st.remaining_steps:
        facts.append(("to the stop rule", f"at most {st.remaining_steps} steps"))
    if st.potential_model != "exact":
        facts.append(("site potentials", f"approximate: the map is {st.potential_model}"))
    parts.append(_facts(facts))
    return "".join(parts)


def _facts(items: Sequence[tuple[str, str]]) -> str:
    body = "".join(f"<dt>{_e(k)}</dt><dd>{_e(v)}</dd>" for k, v in items)
    return f'<dl class="facts">{body}</dl>'


def analysis_findings(summary: AnalysisSummary) -> list[Finding]:
    """The findings of the analysis itself (``summary.findings``); unreadable ones are logged
    and left out."""
    out = []
    for item in summary.findings:
        try:
            out.append(Finding.model_validate(item))
        except ValidationError as err:
            log.warning("analysis finding not readable (%s): %r", err.error_count(), item)
    return out


def _finding_row(step: object, f: Finding, origin: str) -> str:
    tag = f' <span class="muted">({_e(origin)})</span>' if origin else ""
    return (
        f'<tr><td class="num">{_e(step)}</td>'
        f'<td><span class="sev sev-{_e(f.severity)}">{_e(f.severity)}</span></td>'
        f"<td><code>{_e(f.code)}</code>{tag}</td><td>{_e(f.message)}</td></tr>"
    )


def render_findings(steps: Sequence[StepFindings], analysis: Sequence[Finding] = ()) -> str:
    """Findings of every step (severity, code, message), each step's analysis findings after its
    own (marked "analysis"); a step without any says so."""
    if not steps and not analysis:
        return '<p class="muted">no finished step yet</p>'
    by_step: dict[int, list[Finding]] = {}
    for f in analysis:
        by_step.setdefault(f.step, []).append(f)
    rows = []
    for s in steps:
        extra = by_step.pop(s.step, [])
        if s.note:
            rows.append(f'<tr><td class="num">{s.step}</td><td colspan="3" class="muted">'
                        f"{_e(s.note)}</td></tr>")  # fmt: skip
        elif not s.findings and not extra:
            rows.append(f'<tr><td class="num">{s.step}</td><td colspan="3" class="muted">'
                        "no findings</td></tr>")  # fmt: skip
        rows += [_finding_row(s.step, f, "") for f in s.findings]
        rows += [_finding_row(s.step, f, "analysis") for f in extra]
    for step in sorted(by_step):
        rows += [_finding_row(step, f, "analysis") for f in by_step[step]]
    return (
        '<div class="table-wrap"><table><thead><tr><th>step</th><th>severity</th><th>code</th>'
        f"<th>message</th></tr></thead><tbody>{''.join(rows)}</tbody></table></div>"
    )


#: Labels and units of the optional fields of :class:`ionwell.analysis.tables.Reference`.
_REFERENCE_FIELDS: dict[str, tuple[str, str]] = {
    "atom_energy": ("isolated atom energy", "eV"),
    "bulk_energy": ("bulk reference energy", "eV"),
    "bulk_atoms": ("atoms in the bulk cell", ""),
    "cohesive_energy": ("cohesive energy", "eV per atom"),
}


def render_reference(summary: AnalysisSummary) -> str:
    """The guest's chemical potential μ and where it came from."""
    ref = summary.reference
    if ref is None:
        return (
            '<p class="muted">No guest reference in the campaign config (analysis.reference): '
            "no formation energies, hull or voltages.</p>"
        )
    facts = [("μ of the guest", f"{ref.mu:.6f} eV"), ("source", ref.source)]
    for key, value in ref.model_dump().items():
        if key in ("mu", "source") or value is None:
            continue
        label, unit = _REFERENCE_FIELDS.get(key, (key.replace("_", " "), ""))
        shown = f"{value:.6f}" if isinstance(value, float) else str(value)
        facts.append((label, f"{shown} {unit}".strip()))
    if summary.hull_steps:
        facts.append(("hull vertices at steps", ", ".join(map(str, summary.hull_steps))))
    if summary.voltages:
        facts.append(("voltage steps", ", ".join(f"{v:.3f} V" for v in summary.voltages)))
    return _facts(facts)


def _flatten(data: object, prefix: str = "") -> list[tuple[str, str]]:
    """``(dotted key, shown value)`` of nested settings; None shown as "–"."""
    if isinstance(data, dict):
        if not data and prefix:
            return [(prefix, "–")]
        out: list[tuple[str, str]] = []
        for key, value in data.items():
            out += _flatten(value, f"{prefix}.{key}" if prefix else str(key))
        return out
    if data is None:
        return [(prefix, "–")]
    if isinstance(data, list | tuple):
        return [(prefix, ", ".join(str(v) for v in data) or "–")]
    return [(prefix, str(data))]


def render_settings(summary: AnalysisSummary) -> str:
    """The analysis settings the numbers and figures were made with, and their source."""
    if not summary.settings:
        return (
            '<p class="muted">The analysis did not record its settings (analysis.json from an '
            "older ionwell); run the analysis again to see them.</p>"
        )
    facts = [("taken from", summary.settings_source or "not recorded")]
    facts += _flatten(summary.settings)
    return _facts(facts)


def _sections(rep: CampaignReport) -> list[tuple[str, str]]:
    """(key, title) of the subsections of one campaign; the anchor is ``<campaign id>-<key>``."""
    items = [
        ("status", "Status"),
        ("findings", "Findings"),
        ("reference", "Guest reference"),
        ("settings", "Analysis settings"),
    ]
    if rep.figures:
        items.append(("plots", "Plots"))
    if rep.tables:
        items.append(("tables", "Tables"))
    items.append(("config", "Campaign config"))
    return items


def render_campaign(rep: CampaignReport, prefix: str) -> str:
    """The section of one campaign; every id starts with ``prefix``."""
    ids = {key: f"{prefix}-{key}" for key, _ in _sections(rep)}
    summary = rep.summary
    facts = [
        ("folder", rep.root),
        ("host", rep.host_formula),
        ("guest", f"{rep.guest} ({rep.charge_mode} mode)"),
        ("numbers from", summary.method or rep.engine),
    ]
    if summary.formula_unit:
        unit = energetics.formula_text(summary.formula_unit)
        facts.append(("formula unit", f"{unit}: x counts {rep.guest} per {unit}"))
    if summary.charge_scheme:
        facts.append(("charges", summary.charge_scheme))
    facts += [("steps done", str(len(rep.status.rows))), ("state", rep.status.state)]
    out = [f'<section id="{prefix}"><h2>Campaign {_e(rep.name)}</h2>']
    if rep.description:
        out.append(f"<p>{_e(rep.description)}</p>")
    out.append(_facts(facts))
    if rep.summary.caution:
        out.append(f'<div class="note caution"><strong>Caution:</strong> '
                   f"{_e(rep.summary.caution)}</div>")  # fmt: skip
    out.append(f'<div class="note model">{_e(MODEL_NOTE)}</div>')
    for n in rep.notes:
        out.append(f'<div class="note">{_e(n)}</div>')
    out.append(f'<h3 id="{ids["status"]}">Status</h3>{render_status(rep.status)}')
    findings = render_findings(rep.findings, analysis_findings(summary))
    out.append(f'<h3 id="{ids["findings"]}">Findings</h3>{findings}')
    out.append(f'<h3 id="{ids["reference"]}">Guest reference</h3>{render_reference(summary)}')
    out.append(f'<h3 id="{ids["settings"]}">Analysis settings</h3>{render_settings(summary)}')
    if rep.figures:
        out.append(f'<h3 id="{ids["plots"]}">Plots</h3>')
        out += [render_figure(f) for f in rep.figures]
    if summary.structures:
        n = len(summary.structures)
        out.append(
            f'<p class="muted">Side and top views of every step ({n} PNG'
            f"{'s' if n != 1 else ''}, one per step, the last shown above) are in "
            f"analysis/{STRUCTURES_FOLDER}/ of the campaign folder "
            f"({_e(Path(rep.root) / 'analysis' / STRUCTURES_FOLDER)}).</p>"
        )
    if rep.tables:
        out.append(f'<h3 id="{ids["tables"]}">Tables</h3>')
        out += [render_csv_table(t) for t in rep.tables]
    out.append(
        f'<h3 id="{ids["config"]}">Campaign config</h3><details><summary>campaign.yaml as run'
        f"</summary><pre>{_e(rep.config_text)}</pre></details></section>"
    )
    return "".join(out)


def _voltage_range(summary: AnalysisSummary) -> str:
    if not summary.voltages:
        return "–"
    lo, hi = min(summary.voltages), max(summary.voltages)
    return f"{lo:.3f} V" if lo == hi else f"{lo:.3f} to {hi:.3f} V"


def render_comparison(
    reports: Sequence[CampaignReport], figures: Sequence[Figure], notes: Sequence[str]
) -> str:
    """The comparison section: one summary row per campaign, then the comparison plots."""
    header = ["campaign", "host", "guest", "engine", "steps", "guests", "hull vertices",
              "voltage range"]  # fmt: skip
    rows = []
    for i, rep in enumerate(reports):
        guests = rep.status.rows[-1].guests if rep.status.rows else 0
        hull = str(len(rep.summary.hull_steps)) if rep.summary.reference is not None else "–"
        rows.append(
            f'<tr><td><a href="#{_campaign_id(i, rep)}">{_e(rep.name)}</a></td>'
            f"<td>{_e(rep.host_formula)}</td><td>{_e(rep.guest)}</td><td>{_e(rep.engine)}</td>"
            f'<td class="num">{len(rep.status.rows)}</td><td class="num">{guests}</td>'
            f'<td class="num">{hull}</td><td class="num">{_voltage_range(rep.summary)}</td></tr>'
        )
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    out = [
        '<section id="comparison"><h2>Comparison</h2>',
        f'<div class="table-wrap"><table><thead><tr>{head}</tr></thead>'
        f"<tbody>{''.join(rows)}</tbody></table></div>",
        f'<div class="note model">{_e(MODEL_NOTE)}</div>',
    ]
    out += [f'<div class="note">{_e(n)}</div>' for n in notes]
    out += [render_figure(f) for f in figures]
    out.append("</section>")
    return "".join(out)


def _campaign_id(i: int, rep: CampaignReport) -> str:
    return f"c{i + 1}-{anchor(rep.name)}"


def render_toc(reports: Sequence[CampaignReport], comparison: bool) -> str:
    """The table of contents: links to every section."""
    items = []
    if comparison:
        items.append('<li><a href="#comparison">Comparison</a></li>')
    for i, rep in enumerate(reports):
        cid = _campaign_id(i, rep)
        sub = "".join(f'<li><a href="#{cid}-{k}">{_e(t)}</a></li>' for k, t in _sections(rep))
        items.append(f'<li><a href="#{cid}">Campaign {_e(rep.name)}</a><ul>{sub}</ul></li>')
    return f'<nav class="toc"><strong>Contents</strong><ul>{"".join(items)}</ul></nav>'


def render_page(
    reports: Sequence[CampaignReport],
    comparison: Sequence[Figure] = (),
    notes: Sequence[str] = (),
    generated: str = "",
) -> str:
    """The whole self-contained page: inline CSS and script, images as data URIs."""
    several = len(reports) > 1
    if several:
        title = f"ionwell report: {len(reports)} campaigns"
        lead = ", ".join(r.name for r in reports)
    else:
        title = f"ionwell report: {reports[0].name}"
        lead = f"{reports[0].guest} into {reports[0].host_formula}, {reports[0].engine}"
    body = [
        f"<h1>{_e(title)}</h1>",
        f'<p class="meta">{_e(lead)}</p>',
        render_toc(reports, several),
    ]
    if several:
        body.append(render_comparison(reports, comparison, notes))
    body += [render_campaign(rep, _campaign_id(i, rep)) for i, rep in enumerate(reports)]
    stamp = f" on {_e(generated)}" if generated else ""
    body.append(f"<footer>Written by ionwell {_e(ionwell.__version__)}{stamp}.</footer>")
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{_e(title)}</title>\n<style>{_CSS}</style>\n</head>\n"
        f"<body>\n<main>\n{''.join(body)}\n</main>\n<script>{_SCRIPT}</script>\n</body>\n</html>\n"
    )
