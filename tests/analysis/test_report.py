"""`ionwell report`: one self-contained HTML page from two real tiny campaigns (PySCF through
Snakemake), checked as text and opened in headless Chromium; and the page's parts from
hand-made models (fast)."""

from __future__ import annotations

import base64
import html
import io
import json
import os
import re
import shutil
import struct
import subprocess
import sys
from pathlib import Path

import matplotlib.image as mpimg
import pytest
import yaml
from shared import TINY as CAMPAIGN_RUN_TINY

from ionwell.analysis.report import (
    MODEL_NOTE,
    CampaignReport,
    StepFindings,
    _analysis_files,
    comparison_figures,
    figure_caption,
    gather_campaign,
    render_campaign,
    render_status,
)
from ionwell.analysis.tables import AnalysisSummary, Reference
from ionwell.audit.status import CampaignStatus, StepRow, campaign_status
from ionwell.science.checks import Finding

slow = pytest.mark.slow

IONWELL = [sys.executable, "-m", "ionwell.cli"]

# The campaign test's tiny campaign (Li into one benzene sheet, LDA/STO-3G, coarse grid, with
# its guest reference), here without relaxation and with two guests.
TINY = {
    **CAMPAIGN_RUN_TINY,
    "name": "tiny-deepest",
    "relax": {"enabled": False},
    "stop": {"guests": 2, "max_steps": 5},
}

# the second campaign draws its sites with Boltzmann weights at a high temperature
THERMAL = {
    **TINY,
    "name": "tiny-thermal",
    "seed": 11,
    "placement": {"within": 3.0, "rule": "thermal", "temperature": 3000.0},
}

CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
]


def _ionwell(*args: str, cwd: Path | None = None, timeout: float = 600):
    return subprocess.run(
        [*IONWELL, *args], capture_output=True, text=True, timeout=timeout, cwd=cwd
    )


@pytest.fixture(scope="module")
def campaigns(tmp_path_factory) -> tuple[Path, Path]:
    """Two finished tiny campaigns that differ in their placement rule."""
    root = tmp_path_factory.mktemp("report-campaigns")
    out = []
    for data in (TINY, THERMAL):
        cfg = root / f"{data['name']}.yaml"
        cfg.write_text(yaml.safe_dump(data))
        proc = _ionwell("run", str(cfg), "--root", str(root))
        assert proc.returncode == 0, proc.stderr[-3000:]
        out.append(root / "campaigns" / data["name"])
    return out[0], out[1]


def _chromium() -> str | None:
    for c in ("/usr/bin/chromium", shutil.which("chromium"), shutil.which("chromium-browser")):
        if c and Path(c).is_file() and os.access(c, os.X_OK):
            return c
    return None


def _browser(page: Path, tmp: Path, *extra: str) -> subprocess.CompletedProcess:
    """Headless Chromium on ``page`` with a fresh profile; no network use is needed."""
    exe = _chromium()
    if exe is None:
        pytest.skip("chromium is not installed (/usr/bin/chromium or on PATH); .ci/run installs it")
    profile = tmp / f"profile-{len(list(tmp.glob('profile-*')))}"
    profile.mkdir()
    argv = [exe, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", "--virtual-time-budget=5000",
            *extra, page.resolve().as_uri()]  # fmt: skip
    proc = subprocess.run(argv, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    return proc


def _assert_images_load(page: Path, tmp: Path) -> int:
    """Open the page; every image decodes (counted by the page's own script after load)."""
    dom = _browser(page, tmp, "--dump-dom").stdout
    body = re.search(r"<body[^>]*>", dom)
    assert body, dom[:2000]
    loaded = re.search(r'data-images-loaded="(\d+)"', body.group(0))
    total = re.search(r'data-images-total="(\d+)"', body.group(0))
    assert loaded and total, body.group(0)
    assert int(total.group(1)) > 0
    assert loaded.group(1) == total.group(1)
    return int(total.group(1))


def _assert_screenshot_not_blank(page: Path, tmp: Path) -> None:
    shot = tmp / "shot.png"
    _browser(page, tmp, f"--screenshot={shot}", "--window-size=1280,2400")
    assert shot.is_file() and shot.stat().st_size > 0
    pixels = mpimg.imread(shot)
    assert pixels.shape[0] > 100 and pixels.shape[1] > 100
    assert float(pixels[..., :3].std()) > 0.02  # text, tables and plots, not an empty page


def _assert_self_contained(text: str) -> list[tuple[int, int]]:
    """No external reference of any kind; every image a PNG data URI. Returns the image sizes."""
    assert not re.search(r"https?://", text)
    assert not re.search(r"url\(|@import", text)
    for target in re.findall(r'\b(?:src|href)\s*=\s*["\']([^"\']*)', text):
        assert target.startswith(("data:image/png;base64,", "#")), target[:80]
    sizes = []
    imgs = re.findall(r"<img\b[^>]*>", text)
    assert imgs
    for tag in imgs:
        m = re.search(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', tag)
        assert m, tag[:200]
        data = base64.b64decode(m.group(1), validate=True)
        assert data.startswith(b"\x89PNG\r\n\x1a\n") and data[12:16] == b"IHDR"
        w, h = struct.unpack(">II", data[16:24])
        assert w > 0 and h > 0
        pixels = mpimg.imread(io.BytesIO(data), format="png")
        assert pixels.shape[:2] == (h, w)
        width = re.search(r'width="(\d+)"', tag)
        height = re.search(r'height="(\d+)"', tag)
        assert width and height and (int(width.group(1)), int(height.group(1))) == (w, h)
        sizes.append((w, h))
    return sizes


@slow
def test_single_campaign_report(campaigns, tmp_path):
    a, _ = campaigns
    # a copy whose analysis is gone: the report brings it up to date first
    root = tmp_path / "copy" / a.name
    shutil.copytree(a, root)
    shutil.rmtree(root / "analysis")
    proc = _ionwell("report", str(root), timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    page = root / "analysis" / "report.html"
    assert f"report written to {page}" in proc.stdout
    assert (root / "analysis" / "analysis.json").is_file()
    text = page.read_text()
    sizes = _assert_self_contained(text)
    summary = json.loads((root / "analysis" / "analysis.json").read_text())
    assert len(sizes) >= sum(f.endswith(".png") for f in summary["files"]) >= 2

    assert "tiny-deepest" in text
    st = campaign_status(root)
    assert len(st.rows) == 3
    for r in st.rows:
        assert f"{r.energy:.6f}" in text
    # the status table's insertion energy per guest against μ, and what μ is
    assert "<th>E_ins / eV per guest</th>" in text
    if st.mu is None:
        assert "needs analysis.reference" in text
    else:
        assert f"μ = {st.mu:.6f} eV per guest" in text
        assert [r.insertion_energy is None for r in st.rows] == [True, False, False]
        for r in st.rows[1:]:
            assert f'<td class="num">{r.insertion_energy:.4f}</td>' in text
    # the method and formula unit near the top, the settings with their source
    head = text.split("<h3", 1)[0]
    assert summary["method"] and html.escape(summary["method"]) in head
    unit = "".join(f"{el}{k if k != 1 else ''}" for el, k in summary["formula_unit"].items())
    assert f"{unit}: x counts Li per {unit}" in head
    assert "Analysis settings</h3>" in text
    assert html.escape(summary["settings_source"]) in text
    for f in summary["findings"]:
        assert html.escape(f["message"]) in text
    # the filling sequence first among the figures, then the last step's structure view
    rep = gather_campaign(root)
    names = [f.name for f in rep.figures]
    first = ([summary["filling"]] if summary["filling"] else []) + summary["structures"][-1:]
    assert names[: len(first)] == first
    assert len(names) == len(set(names))
    assert sum(n.startswith("structures/") for n in names) == min(1, len(summary["structures"]))
    if summary["filling"]:
        assert "Where the guests went: filling sequence, side and top views" in text
    if summary["structures"]:
        assert "analysis/structures/" in text
    assert "finished" in text
    assert f"{summary['reference']['mu']:.6f} eV" in text
    assert "Li cohesive energy" in text
    assert "not safety data for real cells" in text
    assert ("Caution:" in text) == bool(summary["caution"])  # cation mode
    flagged = {f["step"] for f in summary["findings"]}  # analysis findings go with their step
    quiet = [
        r.step
        for r in st.rows
        if not json.loads((root / "steps" / f"{r.step:04d}" / "checks.json").read_text())
        and r.step not in flagged
    ]
    assert text.count("no findings") == len(quiet)
    assert "energetics.csv" in text and "voltage.csv" in text
    assert "<details><summary>campaign.yaml as run" in text
    assert 'id="comparison"' not in text
    # the table of contents points at ids that exist
    ids = set(re.findall(r'\bid="([^"]+)"', text))
    assert {h[1:] for h in re.findall(r'href="(#[^"]+)"', text)} <= ids

    assert _assert_images_load(page, tmp_path) == len(sizes)
    _assert_screenshot_not_blank(page, tmp_path)


@slow
def test_report_of_a_running_campaign_reanalyses_when_the_ledger_is_newer(campaigns, tmp_path):
    a, _ = campaigns
    root = tmp_path / a.name
    shutil.copytree(a, root)
    stamp = root / "analysis" / "analysis.json"
    # extra files the analysis did not list are shown after the listed ones
    shutil.copy(root / "analysis" / "hull.png", root / "analysis" / "zz_extra.png")
    (root / "analysis" / "aa_extra.csv").write_text("a,b\n1,2\n")
    old = (root / "ledger.jsonl").stat().st_mtime - 100
    os.utime(stamp, (old, old))
    rep = gather_campaign(root)
    assert stamp.stat().st_mtime > old + 50  # analysed again
    summary = json.loads(stamp.read_text())
    listed = summary["files"]
    # the filling sequence and the last step's view first, then the files analysis.json lists,
    # in its order; the others follow
    views = ([summary["filling"]] if summary["filling"] else []) + summary["structures"][-1:]
    for kind, got in (
        ("png", [f.name for f in rep.figures]),
        ("csv", [t.name for t in rep.tables]),
    ):
        first = [f for f in listed if f.endswith(f".{kind}") and f not in views]
        if kind == "png":
            first = views + first
        assert got[: len(first)] == first
        assert f"{'zz_extra' if kind == 'png' else 'aa_extra'}.{kind}" in got[len(first) :]
    assert rep.figures[-1].caption == "zz_extra"


@slow
def test_several_campaigns_are_compared(campaigns, tmp_path):
    a, b = campaigns
    page = tmp_path / "both.html"
    proc = _ionwell("report", str(a), str(b), "-o", str(page), timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    text = page.read_text()
    _assert_self_contained(text)
    comparison = text.split('<section id="comparison">', 1)[1].split("</section>", 1)[0]
    assert "tiny-deepest" in comparison and "tiny-thermal" in comparison
    assert comparison.count("<tr>") == 3  # header and one row per campaign
    assert "pyscf (lda,vwn / sto-3g)" in comparison
    assert "compare_formation.png" in comparison and "compare_voltage.png" in comparison
    assert comparison.count("<img") == 2
    # the comparison comes before the campaigns, each campaign has its own section
    assert text.index('id="comparison"') < text.index('id="c1-tiny-deepest"')
    assert 'id="c2-tiny-thermal"' in text
    assert _assert_images_load(page, tmp_path) == text.count("<img")
    _assert_screenshot_not_blank(page, tmp_path)


@slow
def test_comparison_leaves_out_campaigns_without_formation_energies(campaigns):
    a, b = campaigns
    ra, rb = gather_campaign(a), gather_campaign(b)
    t = rb.table("energetics.csv")
    col = t.header.index("formation_eV")
    blank = t.model_copy(update={"rows": [[*r[:col], "", *r[col + 1 :]] for r in t.rows]})
    rb_noref = rb.model_copy(update={"tables": [blank]})
    figures, notes = comparison_figures([ra, rb_noref])
    assert [f.name for f in figures] == ["compare_formation.png", "compare_voltage.png"]
    assert any(n.startswith("tiny-thermal: no formation energies") for n in notes)
    figures, notes = comparison_figures([rb_noref, rb_noref])
    assert figures == []
    assert any("comparison plots are not drawn" in n for n in notes)


@slow
def test_bad_input_gives_one_clear_message(campaigns, tmp_path):
    proc = _ionwell("report", "/nonexistent")
    assert proc.returncode != 0
    assert "/nonexistent" in proc.stderr and "Traceback" not in proc.stderr
    assert proc.stderr.strip().count("\n") == 0

    proc = _ionwell("report", str(tmp_path))
    assert proc.returncode != 0 and "Traceback" not in proc.stderr
    assert "not a campaign folder" in proc.stderr

    # a campaign folder without a finished step: the analysis says so
    empty = tmp_path / "empty"
    empty.mkdir()
    shutil.copy(campaigns[0] / "campaign.yaml", empty / "campaign.yaml")
    proc = _ionwell("report", str(empty))
    assert proc.returncode != 0 and "Traceback" not in proc.stderr
    assert "no finished step" in proc.stderr


# --- the page's parts from hand-made models (fast) -------------------------------------------


def _status(mu: float | None) -> CampaignStatus:
    energies = [-100.0, -107.5, -114.9]
    rows = []
    for k, e in enumerate(energies):
        e_ins = None if mu is None or k == 0 else e - energies[k - 1] - mu
        rows.append(
            StepRow(step=k, guests=k, energy=e, insertion_energy=e_ins, scf_iterations=12,
                    site_potential=None, findings="-", wall_time=3.0, outcome="ok")
        )  # fmt: skip
    return CampaignStatus(
        name="hand-made", folder="/tmp/hand-made", guest="Li", rows=rows, state="finished",
        mu=mu, mu_source=None if mu is None else "given in the campaign config",
    )  # fmt: skip


def _summary(**update) -> AnalysisSummary:
    base = AnalysisSummary(
        folder="/tmp/hand-made/analysis",
        steps=3,
        reference=Reference(mu=-7.3, source="given in the campaign config"),
        hull_steps=[0, 2],
        voltages=[0.21],
        files=["filling.png", "energetics.csv", "hull.png"],
        settings={"rim_width": 3.0, "dos_width": 0.1, "reference": {"value": -7.3, "bulk": None}},
        settings_source="analysis.yaml in the campaign folder",
        formula_unit={"C": 6},
        charge_scheme="mulliken",
        method="tblite (GFN2-xTB)",
        findings=[
            {
                "severity": "warning",
                "code": "negative-voltage",
                "message": "a voltage step of -0.12 V between 1 and 2 guests",
                "step": 2,
            },
        ],  # fmt: skip
        structures=[
            "structures/step_0000.png",
            "structures/step_0001.png",
            "structures/step_0002.png",
        ],  # fmt: skip
        filling="filling.png",
    )
    return base.model_copy(update=update)


def _report(status: CampaignStatus, summary: AnalysisSummary) -> CampaignReport:
    quiet = StepFindings(step=0)
    busy = StepFindings(step=1, findings=[
        Finding(severity="info", code="guest-outside", message="one guest sits outside", step=1)
    ])  # fmt: skip
    return CampaignReport(
        root="/tmp/hand-made", name="hand-made", host_formula="C48H24", guest="Li",
        charge_mode="neutral", engine="tblite (GFN2-xTB)", status=status, summary=summary,
        findings=[quiet, busy, StepFindings(step=2)], figures=[], tables=[],
        config_text="name: hand-made\n",
    )  # fmt: skip


def test_status_names_the_insertion_energy_and_mu():
    text = render_status(_status(None))
    assert "<th>E_ins / eV per guest</th>" in text
    assert "needs analysis.reference" in text
    assert "μ =" not in text
    text = render_status(_status(-7.3))
    assert "needs analysis.reference" not in text
    assert "μ = -7.300000 eV per guest (given in the campaign config)" in text
    assert '<td class="num">-0.2000</td>' in text and '<td class="num">-0.1000</td>' in text


def test_campaign_section_shows_method_unit_settings_and_analysis_findings():
    text = render_campaign(_report(_status(-7.3), _summary()), "c1-hand-made")
    head = text.split("<h3", 1)[0]
    assert "tblite (GFN2-xTB)" in head
    assert "C6: x counts Li per C6" in head
    assert html.escape(MODEL_NOTE) in text
    settings = text.split('id="c1-hand-made-settings"', 1)[1].split("<h3", 1)[0]
    assert "analysis.yaml in the campaign folder" in settings
    assert "<dt>rim_width</dt><dd>3.0</dd>" in settings
    assert "<dt>reference.value</dt><dd>-7.3</dd>" in settings
    assert "<dt>reference.bulk</dt><dd>–</dd>" in settings
    findings = text.split('id="c1-hand-made-findings"', 1)[1].split("<h3", 1)[0]
    assert "negative-voltage" in findings and "(analysis)" in findings
    assert "guest-outside" in findings
    assert findings.count("no findings") == 1  # step 0 only: step 2 has an analysis finding
    assert findings.index("guest-outside") < findings.index("negative-voltage")
    assert "3 PNGs, one per step" in text and "analysis/structures/" in text

    older = _summary(settings={}, settings_source="", findings=[], structures=[], method="",
                     formula_unit={})  # fmt: skip
    text = render_campaign(_report(_status(None), older), "c1")
    assert "did not record its settings" in text
    assert "analysis/structures/" not in text
    assert "formula unit" not in text


def test_analysis_files_put_the_views_first_and_scan_no_subfolder(tmp_path):
    folder = tmp_path / "analysis"
    (folder / "structures").mkdir(parents=True)
    png = b"\x89PNG\r\n\x1a\n"
    for name in ("filling.png", "hull.png", "zz_extra.png", "energetics.csv",
                 "structures/step_0000.png", "structures/step_0001.png",
                 "structures/step_0002.png", "structures/stray.png"):  # fmt: skip
        (folder / name).write_bytes(png)
    summary = _summary(files=["filling.png", "energetics.csv", "hull.png",
                              "structures/step_0001.png"])  # fmt: skip
    files, notes = _analysis_files(folder, summary)
    rel = [p.relative_to(folder).as_posix() for p in files]
    assert rel == ["filling.png", "structures/step_0002.png", "energetics.csv", "hull.png",
                   "zz_extra.png"]  # fmt: skip
    assert notes == []
    # without views: the listed files in order, then the others at the top level
    bare = _summary(filling=None, structures=[], files=["hull.png"])
    rel = [p.relative_to(folder).as_posix() for p in _analysis_files(folder, bare)[0]]
    assert rel == ["hull.png", "energetics.csv", "filling.png", "zz_extra.png"]


def test_figure_captions():
    assert figure_caption("filling.png") == (
        "Where the guests went: filling sequence, side and top views"
    )
    assert figure_caption("structures/step_0012.png").startswith("Step 12: Side and top views")
    assert figure_caption("hull.png").startswith("Formation energy")
    assert figure_caption("other/thing.png") == "thing"
