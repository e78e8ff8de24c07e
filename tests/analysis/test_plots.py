"""The figures (ionwell.analysis.plots): structure views and the filling sequence (structures),
the caution stamp every figure shares (common), the analysis charts and the report's comparison
charts (charts); and that nothing outside the plots package imports matplotlib. A coronene
bilayer from the project's flake builder with Li guests in its gallery and one outside it."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest
from ase import Atoms

from ionwell.analysis.plots import charts, common, structures
from ionwell.config.campaign import FlakeBuilder
from ionwell.science.diagnostics import StepDiagnostics
from ionwell.science.host import build_flake
from ionwell.science.occupancy import GuestSpacing

CAUTION = (
    "Model result: tblite GFN2-xTB on a finite hydrogen-terminated flake in vacuum; energies and "
    "voltages are not measurements."
)

# in-plane positions (Å) of the guests, in the order they are placed
GUEST_XY = [(0.0, 0.0), (2.5, 1.4), (-2.5, -1.4), (0.0, 3.0)]


@pytest.fixture(scope="module")
def bilayer() -> Atoms:
    """Coronene bilayer (AB, 3.35 Å), centred on the origin: the gallery is the plane z = 0."""
    return build_flake(FlakeBuilder(shells=2, layers=2))


def _with_guests(host: Atoms, k: int) -> tuple[Atoms, list[str]]:
    """The host with the first ``k`` guests: three in the gallery, the fourth above the stack."""
    top = float(host.positions[:, 2].max())
    atoms = host.copy()
    labels = []
    for i, (x, y) in enumerate(GUEST_XY[:k]):
        z = 0.0 if i < 3 else top + 1.8
        atoms += Atoms("Li", positions=[(x, y, z)])
        labels.append("gallery 0" if i < 3 else "outside galleries")
    return atoms, labels


def _png_size(path: Path) -> tuple[int, int]:
    data = path.read_bytes()
    assert data.startswith(b"\x89PNG\r\n\x1a\n") and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def _texts(fig) -> list[str]:
    """Every text on the figure: figure texts, axes titles and texts, legend texts."""
    out = [t.get_text() for t in fig.texts]
    for ax in fig.axes:
        out += [ax.get_title(loc) for loc in ("left", "center", "right")]
        out += [t.get_text() for t in ax.texts]
        leg = ax.get_legend()
        if leg is not None:
            out += [t.get_text() for t in leg.get_texts()] + [leg.get_title().get_text()]
    return [t for t in out if t]


def _caution_text(fig) -> str | None:
    found = [t for t in fig.texts if t.get_gid() == "caution"]
    assert len(found) <= 1
    return found[0].get_text() if found else None


def _outlined(ax) -> int:
    """Guests outlined as new in one panel (the collection drawn without a fill)."""
    from matplotlib.collections import EllipseCollection

    n = 0
    for c in ax.collections:
        if not isinstance(c, EllipseCollection):
            continue
        face = c.get_facecolor()
        if len(face) == 0 or np.allclose(face[:, 3], 0.0):
            n += len(c.get_offsets())
    return n


def test_select_frames_takes_first_last_and_even_steps():
    assert structures.select_frames([]) == []
    assert structures.select_frames([0, 1, 2]) == [0, 1, 2]
    assert structures.select_frames([0, 1, 1, 2]) == [0, 1, 2]  # repeats dropped
    steps = list(range(20))
    picked = structures.select_frames(steps, 8)
    assert len(picked) == 8 and picked[0] == 0 and picked[-1] == 19
    assert picked == sorted(picked) and len(set(picked)) == 8
    assert np.diff(picked).max() - np.diff(picked).min() <= 1  # evenly spaced
    assert structures.select_frames([3, 7, 11, 15, 19], 3) == [3, 11, 19]
    assert structures.select_frames(steps, 2) == [0, 19]
    assert structures.select_frames(steps, 1) == [19]


def test_group_colours_depend_on_the_label_only():
    labels = ["gallery 0", "gallery 1", "gallery 2", "outside galleries", "rim", "interior"]
    colours = [structures.group_colour(lab) for lab in labels[:4]]
    assert len(set(colours)) == 4
    assert structures.group_colour("gallery 1") == structures.group_colour("gallery 1 · interior")
    assert structures.group_colour("rim") != structures.group_colour("interior")
    assert structures.group_colour("some other label") == structures.group_colour(
        "some other label"
    )
    assert all(c.startswith("#") and len(c) == 7 for c in map(structures.group_colour, labels))


def test_structure_view_draws_both_panels_with_labels_and_caution(bilayer, tmp_path):
    n_host = len(bilayer)
    atoms, labels = _with_guests(bilayer, 4)
    fig = structures._structure_figure(atoms, n_host, normal=[0, 0, 1], groups=labels,
                                  title="step 4: 4 Li", caution=CAUTION, new=[3])  # fmt: skip
    try:
        texts = _texts(fig)
        assert "step 4: 4 Li" in texts
        assert any(t.startswith("side view") for t in texts)
        assert any(t.startswith("top view") for t in texts)
        for name in ("gallery 0", "outside galleries", "placed this step", "C (host)", "5 Å"):
            assert name in texts, name
        assert " ".join(_caution_text(fig).split()) == " ".join(CAUTION.split())
        assert "\n" in _caution_text(fig)  # wrapped to the figure's width
        panels = [ax for ax in fig.axes if ax.get_title(loc="left")]
        assert len(panels) == 2
        for ax in panels:
            assert _outlined(ax) == 1
            assert ax.get_aspect() == 1.0
    finally:
        common.pyplot().close(fig)

    path = tmp_path / "step_0004.png"
    structures.structure_view(path, atoms, n_host, normal=None, groups=labels, title="step 4: 4 Li",
                         caution=CAUTION, new=[3])  # fmt: skip
    w, h = _png_size(path)
    assert 400 <= w <= 2500 and 400 <= h <= 2500
    assert path.stat().st_size > 10_000


def test_structure_view_without_guests_or_caution(bilayer, tmp_path):
    fig = structures._structure_figure(
        bilayer, len(bilayer), normal=None, groups=[], title="step 0"
    )
    try:
        assert _caution_text(fig) is None
        assert "placed this step" not in _texts(fig)
    finally:
        common.pyplot().close(fig)
    path = tmp_path / "step_0000.png"
    structures.structure_view(path, bilayer, len(bilayer), normal=(0, 0, 1), groups=[],
                         title="step 0")  # fmt: skip
    assert min(_png_size(path)) > 200


def test_structure_view_tolerates_missing_labels(bilayer, caplog):
    atoms, _ = _with_guests(bilayer, 2)
    fig = structures._structure_figure(atoms, len(bilayer), normal=None, groups=["gallery 0"],
                                  title="t", new=[5])  # fmt: skip
    try:
        assert "guest" in _texts(fig)  # the unlabelled guest
    finally:
        common.pyplot().close(fig)
    assert "group labels for 2 guests" in caplog.text
    assert "ignored" in caplog.text


def test_filling_sequence_outlines_the_new_guests_of_each_frame(bilayer, tmp_path):
    n_host = len(bilayer)
    frames, groups = [], []
    for k in (0, 1, 3, 4):  # the steps in between were not selected
        atoms, labels = _with_guests(bilayer, k)
        frames.append((k, atoms))
        groups.append(labels)
    fig = structures._filling_figure(frames, n_host, normal=None, groups=groups,
                                title="Li filling sequence", caution=CAUTION)  # fmt: skip
    try:
        texts = _texts(fig)
        for title in ("step 0 · 0 guests", "step 1 · 1 guest", "step 3 · 3 guests",
                      "step 4 · 4 guests"):  # fmt: skip
            assert title in texts, title
        assert "placed since the step before" in texts
        assert " ".join(_caution_text(fig).split()) == " ".join(CAUTION.split())
        side = [ax for ax in fig.axes if ax.get_title().startswith("step ")]
        assert [_outlined(ax) for ax in side] == [0, 1, 2, 1]
        # one scale for every panel
        assert len({tuple(np.round(ax.get_xlim(), 6)) for ax in side}) == 1
    finally:
        common.pyplot().close(fig)

    path = tmp_path / "filling.png"
    structures.filling_sequence(path, frames, n_host, normal=[0, 0, 1], groups=groups,
                           title="Li filling sequence", caution=CAUTION)  # fmt: skip
    w, h = _png_size(path)
    assert 600 <= w <= 3000 and 400 <= h <= 3000


def test_filling_sequence_thins_too_many_frames(bilayer):
    atoms, labels = _with_guests(bilayer, 1)
    frames = [(s, atoms) for s in range(12)]
    fig = structures._filling_figure(frames, len(bilayer), normal=None, groups=[labels] * 12,
                                title="t")  # fmt: skip
    try:
        titles = [ax.get_title() for ax in fig.axes if ax.get_title().startswith("step ")]
        assert len(titles) == structures.MAX_FRAMES
        assert titles[0].startswith("step 0 ") and titles[-1].startswith("step 11 ")
    finally:
        common.pyplot().close(fig)
    with pytest.raises(ValueError, match="group lists"):
        structures._filling_figure(frames, len(bilayer), normal=None, groups=[], title="t")


# --- the caution stamp and the analysis plots ------------------------------------------------


def test_stamp_caution_adds_room_below_and_keeps_the_axes(tmp_path):
    plt = common.pyplot()
    fig, ax = plt.subplots(figsize=(6, 4), dpi=100)
    fig.suptitle("title")
    fig.tight_layout()
    before = ax.get_window_extent().height
    common.stamp_caution(fig, CAUTION * 3)
    try:
        w, h = fig.get_size_inches()
        assert w == 6 and h > 4
        assert abs(ax.get_window_extent().height - before) < 1.0  # same size in pixels
        text = _caution_text(fig)
        assert text.count("\n") >= 2
        assert max(len(line) for line in text.splitlines()) < 130
        fig.savefig(tmp_path / "stamped.png")
    finally:
        plt.close(fig)
    fig, _ = plt.subplots()
    common.stamp_caution(fig, None)
    common.stamp_caution(fig, "  ")
    assert _caution_text(fig) is None
    plt.close(fig)


@pytest.fixture
def captured(monkeypatch):
    """Figures the plot functions draw, kept open for inspection (closed afterwards)."""
    figs = []

    def keep(fig, path, caution=None):
        fig.tight_layout()
        common.stamp_caution(fig, caution)
        fig.savefig(path)
        figs.append(fig)

    monkeypatch.setattr(charts, "save", keep)
    yield figs
    for fig in figs:
        common.pyplot().close(fig)


def _diag(step: int, guests: int, interior: bool) -> StepDiagnostics:
    gain = 0.8 * guests
    return StepDiagnostics(
        step=step,
        guests=guests,
        spacing=GuestSpacing(guest_indices=[], nearest=[], min=None, mean=None),
        charge_scheme="mulliken (GFN2-xTB)",
        mean_guest_charge=None if guests == 0 else 0.8,
        host_electrons_gained=gain,
        host_electrons_gained_rim=gain if interior else None,
        host_electrons_gained_interior=0.0 if interior else None,
    )


@pytest.mark.parametrize("interior", [True, False])
def test_charges_plot_two_panels_scheme_named(captured, tmp_path, interior):
    diags = [_diag(s, s, interior) for s in range(4)]
    charts.charges_plot(tmp_path / "charges.png", diags, scheme="mulliken (GFN2-xTB)",
                       interior=interior, caution=CAUTION)  # fmt: skip
    (fig,) = captured
    top, bottom = fig.axes
    for ax in (top, bottom):
        assert "Mulliken charges (GFN2-xTB)" in ax.get_title()
    lines = [ln for ln in bottom.get_lines() if len(ln.get_xdata()) == 4]
    assert len(lines) == (3 if interior else 1)
    # no two lines on the same x positions with the same style
    assert len({tuple(ln.get_xdata()) for ln in lines}) == len(lines)
    assert len({(ln.get_marker(), ln.get_linestyle()) for ln in lines}) == len(lines)
    assert _caution_text(fig) is not None
    assert min(_png_size(tmp_path / "charges.png")) > 300


def test_scheme_label():
    assert charts.scheme_label("mulliken") == "Mulliken charges"
    assert charts.scheme_label("iao") == "IAO charges"
    assert charts.scheme_label("mulliken (GFN2-xTB)") == "Mulliken charges (GFN2-xTB)"
    assert charts.scheme_label(None) == "charges"


def test_dos_plot_relative_energies_frontier_and_lumo(captured, tmp_path):
    e = np.linspace(-10, 5, 300)
    curves = [(0, np.exp(-((e + 2) ** 2)), 1.5), (1, np.exp(-((e - 1) ** 2)), None)]
    charts.dos_plot(tmp_path / "dos.png", e, curves, 0.1, "HOMO", caution=CAUTION)
    (fig,) = captured
    (ax,) = fig.axes
    assert "HOMO" in ax.get_xlabel() and ax.get_xlabel().endswith("/ eV")
    assert "LUMO" in ax.get_title()
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    assert any("HOMO" in t for t in legend) and any("LUMO" in t for t in legend)
    ticks = [ln for ln in ax.get_lines() if len(ln.get_xdata()) == 2]
    assert any(np.allclose(ln.get_xdata(), [1.5, 1.5]) for ln in ticks)
    assert _caution_text(fig) is not None

    charts.dos_plot(tmp_path / "dos_f.png", e, [(0, curves[0][1], None)], 0.1, "Fermi level")
    ax = captured[1].axes[0]
    assert "E_\\mathrm{F}" in ax.get_xlabel()
    assert "LUMO" not in ax.get_title()


def test_every_plot_takes_a_caution(captured, tmp_path):
    from ionwell.science import energetics

    n = [0, 1, 2, 3]
    e = [0.0, -1.5, -2.8, -3.9]
    ef = energetics.formation_energies(e, n, -0.2)
    h = energetics.hull(n, ef)
    charts.hull_plot(tmp_path / "hull.png", "Li", [k / 4 for k in n], ef, h, {"C": 6},
                    caution=CAUTION)  # fmt: skip
    steps = energetics.voltage_profile(e, n, -0.2, 4.0, 1)
    charts.voltage_plot(tmp_path / "voltage.png", "Li", steps, {"C": 6}, 1, caution=CAUTION)
    assert len(captured) == 2
    assert "C6" in captured[0].axes[0].get_xlabel()
    for fig in captured:
        assert " ".join(_caution_text(fig).split()) == " ".join(CAUTION.split())


# --- the report's comparison charts ----------------------------------------------------------


def _report(name: str, energetics_rows: list[list[str]], voltage_rows: list[list[str]]):
    from ionwell.analysis.report import CampaignReport, Table

    tables = [
        Table(name="energetics.csv", caption="", header=["x", "formation_eV", "on_hull"],
              rows=energetics_rows),
        Table(name="voltage.csv", caption="", header=["x_from", "x_to", "voltage_V"],
              rows=voltage_rows),
    ]  # fmt: skip
    return CampaignReport.model_construct(name=name, tables=tables)


def _png_bytes_size(data: bytes) -> tuple[int, int]:
    assert data.startswith(b"\x89PNG\r\n\x1a\n") and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def test_comparison_figures_leave_out_what_cannot_be_drawn():
    from ionwell.analysis.report import comparison_figures

    two_steps = _report("a", [["0", "0", "1"], ["0.25", "-0.3", "1"], ["0.5", "-0.2", "0"]],
                        [["0", "0.25", "1.2"]])  # fmt: skip
    one_vertex = _report("b", [["0", "0", "1"], ["0.5", "0.1", "0"]], [])
    no_reference = _report("c", [["0", "", "1"]], [])
    figures, notes = comparison_figures([two_steps, no_reference, one_vertex])
    assert [f.name for f in figures] == ["compare_formation.png", "compare_voltage.png"]
    assert all(f.width > 300 and f.height > 200 for f in figures)
    assert notes == [
        "c: no formation energies (no guest reference in its config); left out of the "
        "comparison plots",
        "b: fewer than two hull vertices, so no voltage step to plot",
    ]
    figures, notes = comparison_figures([one_vertex])
    assert [f.name for f in figures] == ["compare_formation.png"]
    figures, notes = comparison_figures([no_reference])
    assert figures == [] and notes[-1].startswith("no campaign has formation energies")


def test_comparison_charts_draw_png_bytes():
    a = charts.ComparedCampaign("a", 0, [(0.0, 0.0, True), (0.5, -0.4, True)], [(0, 0.5, 0.8)])
    b = charts.ComparedCampaign("b", 1, [(0.0, 0.0, True), (0.5, 0.2, False)])
    w, h = _png_bytes_size(charts.formation_comparison([a, b]))
    assert (w, h) == (7 * common.COMPARISON_DPI, int(4.5 * common.COMPARISON_DPI))
    assert _png_bytes_size(charts.voltage_comparison([a, b])) == (w, h)
    with pytest.raises(ValueError, match="no campaign has a voltage step"):
        charts.voltage_comparison([b])


# --- the layout: all drawing lives in ionwell.analysis.plots ----------------------------------


def test_only_the_plots_package_imports_matplotlib():
    import ast

    import ionwell

    src = Path(ionwell.__file__).parent
    plots_dir = src / "analysis" / "plots"
    offenders = []
    for path in sorted(src.rglob("*.py")):
        if plots_dir in path.parents:
            continue
        for node in ast.walk(ast.parse(path.read_text(), str(path))):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module]
            if any(n == "matplotlib" or n.startswith("matplotlib.") for n in names):
                offenders.append(f"{path.relative_to(src)}:{node.lineno}")
    assert offenders == []
    assert (plots_dir / "charts.py").is_file() and (plots_dir / "structures.py").is_file()
