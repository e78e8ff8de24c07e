"""Pictures of the structures (drawing only; matplotlib, Agg): where the guests went.

* :func:`structure_view`: one step's structure in two panels sharing the horizontal axis — a
  side view (looking along the layers) above a top view (looking down the stacking normal).
* :func:`filling_sequence`: a few chosen steps side by side (side views above top views), each
  step's newly placed guests outlined.
* :func:`select_frames`: which steps a filling sequence shows (pure).

Host atoms are the first ``n_host`` atoms and are drawn small and muted, with their bonds;
guests (the atoms after them) are drawn larger and coloured by a group label such as
"gallery 0", "outside galleries", "rim" or "interior". A compound label "gallery 1 · interior"
takes the colour of its first part and the fill pattern of its second (rim solid, interior
hatched). The colours come from a colour-blind-safe qualitative set and depend on the label
only (:func:`group_colour`), so a label has the same colour in every figure. Lengths are Å;
panels have equal aspect, no axes and a 5 Å scale bar.
"""

from __future__ import annotations

import logging
import math
import re
import zlib
from collections.abc import Sequence
from pathlib import Path

import numpy as np
from ase import Atoms
from ase.data import atomic_numbers, covalent_radii
from ase.data.colors import jmol_colors

from ionwell.analysis.plots.common import DPI, pyplot, stamp_caution

__all__ = [
    "MAX_FRAMES",
    "filling_sequence",
    "group_colour",
    "select_frames",
    "structure_view",
]

log = logging.getLogger("ionwell.analysis.plots.structures")

#: At most this many steps in a filling sequence.
MAX_FRAMES = 8

#: Okabe–Ito colours (colour-blind safe), black left out: it is the "placed this step" outline.
OKABE_ITO = {
    "blue": "#0072B2",
    "orange": "#E69F00",
    "green": "#009E73",
    "purple": "#CC79A7",
    "sky": "#56B4E9",
    "vermillion": "#D55E00",
    "yellow": "#F0E442",
}

#: Galleries take these in turn (gallery 0 blue, gallery 1 orange, ...).
_GALLERY_CYCLE = ("blue", "orange", "green", "purple", "sky", "yellow")

#: Fixed colours of the other labels the analysis uses.
_FIXED = {
    "outside galleries": "vermillion",
    "rim": "vermillion",
    "interior": "blue",
    "guest": "orange",
}

#: Fill pattern of the second part of a compound label ("gallery 0 · interior").
_HATCH = {"rim": "", "interior": "////"}
_OTHER_HATCH = "...."

HOST_C = "#4a4a4a"
HOST_H = "#c4c4c4"
NEW_OUTLINE = "black"
SCALE_BAR = 5.0  # Å

_PAD = 1.3  # Å around the atoms
_BAR_ROOM = 1.8  # Å below the top view for the scale bar
_SEP = " · "


# ---------------------------------------------------------------------------------------------
# pure helpers


def select_frames(steps: Sequence[int], at_most: int = MAX_FRAMES) -> list[int]:
    """Up to ``at_most`` of ``steps`` for a filling sequence: the first, the last and evenly
    spaced ones between them, in the given order, without repeats."""
    unique = list(dict.fromkeys(int(s) for s in steps))
    if at_most < 1 or not unique:
        return []
    if len(unique) <= at_most:
        return unique
    if at_most == 1:
        return [unique[-1]]
    picks = np.linspace(0, len(unique) - 1, at_most)
    return [unique[int(round(float(p)))] for p in picks]


def _split_label(label: str) -> tuple[str, str | None]:
    head, _, rest = label.partition(_SEP)
    return head.strip(), (rest.strip() or None)


def group_colour(label: str) -> str:
    """The colour (hex) of a guest group label; the first part of a compound label decides.

    "gallery k" cycles through six colours by k; "outside galleries", "rim", "interior" and
    "guest" have fixed colours; any other label gets one picked by a checksum of its text, so
    it is the same in every figure.
    """
    head, _ = _split_label(label)
    m = re.fullmatch(r"gallery (\d+)", head)
    if m:
        return OKABE_ITO[_GALLERY_CYCLE[int(m.group(1)) % len(_GALLERY_CYCLE)]]
    if head in _FIXED:
        return OKABE_ITO[_FIXED[head]]
    names = list(OKABE_ITO)
    return OKABE_ITO[names[zlib.crc32(head.encode()) % len(names)]]


def _hatch(label: str) -> str:
    _, tail = _split_label(label)
    if tail is None:
        return ""
    return _HATCH.get(tail, _OTHER_HATCH)


def _label_order(label: str) -> tuple:
    m = re.fullmatch(r"gallery (\d+)", label)
    return (0, int(m.group(1)), "") if m else (1, 0, label)


def _basis(normal: Sequence[float] | None) -> np.ndarray:
    """Rows u, v, n: two in-plane directions and the unit stacking normal (right-handed)."""
    n = np.array([0.0, 0.0, 1.0] if normal is None else normal, dtype=float)
    length = float(np.linalg.norm(n))
    if n.shape != (3,) or not math.isfinite(length) or length < 1e-9:
        log.warning("views: unusable stacking normal %s; looking along z", normal)
        n, length = np.array([0.0, 0.0, 1.0]), 1.0
    n = n / length
    ref = np.array([1.0, 0.0, 0.0]) if abs(n[0]) < 0.9 else np.array([0.0, 1.0, 0.0])
    u = ref - (ref @ n) * n
    u /= np.linalg.norm(u)
    v = np.cross(n, u)
    return np.array([u, v, n])


def _host_style(symbols: Sequence[str]) -> tuple[list[str], np.ndarray]:
    """Muted colours and small radii (Å) of host atoms."""
    colours = []
    radii = np.empty(len(symbols))
    for i, s in enumerate(symbols):
        z = atomic_numbers.get(s, 0)
        radii[i] = 0.32 * covalent_radii[z] + 0.12
        if s == "C":
            colours.append(HOST_C)
        elif s == "H":
            colours.append(HOST_H)
        else:  # the element's usual colour, washed out towards grey
            rgb = 0.45 * np.asarray(jmol_colors[z]) + 0.55 * 0.62
            colours.append("#" + "".join(f"{int(round(255 * c)):02x}" for c in rgb))
    return colours, radii


def _guest_radii(symbols: Sequence[str]) -> np.ndarray:
    return np.array(
        [min(1.0, max(0.5, 0.55 * covalent_radii[atomic_numbers.get(s, 0)])) for s in symbols]
    )


def _bonds(positions: np.ndarray, symbols: Sequence[str]) -> np.ndarray:
    """Host bonds (pairs of indices) closer than 1.2 times the sum of covalent radii."""
    if len(positions) < 2:
        return np.empty((0, 2), dtype=int)
    from scipy.spatial import cKDTree

    r = np.array([covalent_radii[atomic_numbers.get(s, 0)] for s in symbols])
    pairs = cKDTree(positions).query_pairs(1.2 * 2 * float(r.max()), output_type="ndarray")
    if len(pairs) == 0:
        return np.empty((0, 2), dtype=int)
    d = np.linalg.norm(positions[pairs[:, 0]] - positions[pairs[:, 1]], axis=1)
    return pairs[(d < 1.2 * (r[pairs[:, 0]] + r[pairs[:, 1]])) & (d > 0.1)]


def _guest_labels(n_guests: int, groups: Sequence[str], where: str) -> list[str]:
    labels = [str(g) for g in groups[:n_guests]]
    if len(groups) != n_guests:
        log.warning("%s: %d group labels for %d guests; the rest are 'guest'", where,
                    len(groups), n_guests)  # fmt: skip
        labels += ["guest"] * (n_guests - len(labels))
    return labels


# ---------------------------------------------------------------------------------------------
# drawing


class _Scene:
    """One structure projected on the side view (u, n) and the top view (u, v)."""

    def __init__(self, atoms: Atoms, n_host: int, basis: np.ndarray, groups: Sequence[str],
                 new: Sequence[int], where: str) -> None:  # fmt: skip
        if not 0 <= n_host <= len(atoms):
            raise ValueError(f"{where}: n_host = {n_host} but the structure has {len(atoms)}")
        pos = atoms.get_positions() @ basis.T  # columns u, v, n
        symbols = atoms.get_chemical_symbols()
        self.n_host = n_host
        self.pos = pos
        self.cell = atoms.cell.array @ basis.T if atoms.pbc.any() else None
        self.host_colours, self.host_radii = _host_style(symbols[:n_host])
        self.bonds = _bonds(atoms.get_positions()[:n_host], symbols[:n_host])
        n_guests = len(atoms) - n_host
        self.labels = _guest_labels(n_guests, groups, where)
        self.guest_radii = _guest_radii(symbols[n_host:])
        keep = [int(i) for i in new if 0 <= int(i) < n_guests]
        if len(keep) != len(list(new)):
            log.warning("%s: 'new' guest indices outside 0..%d ignored", where, n_guests - 1)
        self.new = sorted(set(keep))
        self.host_symbols = sorted(set(symbols[:n_host]), key=lambda s: (s not in ("C", "H"), s))

    @property
    def guests(self) -> int:
        return len(self.pos) - self.n_host

    def extent(self) -> np.ndarray:
        """Min and max of u, v, n over all atoms (rows), padded, shape (3, 2)."""
        if len(self.pos) == 0:
            return np.array([[-5.0, 5.0]] * 3)
        lo, hi = self.pos.min(axis=0) - _PAD, self.pos.max(axis=0) + _PAD
        return np.column_stack([lo, hi])

    def draw(self, ax, view: str, *, linewidth_scale: float = 1.0) -> None:
        """Draw the ``view`` ("side" or "top") into ``ax`` (data units Å)."""
        from matplotlib.collections import EllipseCollection, LineCollection

        # horizontal, vertical and towards-the-viewer coordinates
        if view == "top":  # looking down the normal from its positive side
            h, v, depth = self.pos[:, 0], self.pos[:, 1], self.pos[:, 2]
        else:  # looking along the in-plane direction u × n = −v
            h, v, depth = self.pos[:, 0], self.pos[:, 2], -self.pos[:, 1]
        xy = np.column_stack([h, v])
        lw = linewidth_scale

        if self.cell is not None:
            self._draw_cell(ax, view, lw)
        if len(self.bonds):
            segs = xy[self.bonds]
            ax.add_collection(LineCollection(segs, colors="0.62", linewidths=0.7 * lw, zorder=1))
        nh = self.n_host
        if nh:
            order = np.argsort(depth[:nh], kind="stable")
            ax.add_collection(
                EllipseCollection(
                    2 * self.host_radii[order], 2 * self.host_radii[order], 0.0, units="xy",
                    offsets=xy[:nh][order], offset_transform=ax.transData,
                    facecolors=[self.host_colours[i] for i in order], edgecolors="0.35",
                    linewidths=0.3 * lw, zorder=2,
                )
            )  # fmt: skip
        if self.guests:
            gi = np.arange(self.guests)
            order = gi[np.argsort(depth[nh:], kind="stable")]
            # one collection per fill pattern, each drawn back to front
            for hatch in sorted({_hatch(lab) for lab in self.labels}):
                sel = [i for i in order if _hatch(self.labels[i]) == hatch]
                r = self.guest_radii[sel]
                ax.add_collection(
                    EllipseCollection(
                        2 * r, 2 * r, 0.0, units="xy", offsets=xy[nh:][sel],
                        offset_transform=ax.transData,
                        facecolors=[group_colour(self.labels[i]) for i in sel],
                        edgecolors="0.15", linewidths=0.6 * lw, hatch=hatch or None, zorder=3,
                    )
                )  # fmt: skip
            if self.new:
                r = self.guest_radii[self.new] + 0.28
                ax.add_collection(
                    EllipseCollection(
                        2 * r, 2 * r, 0.0, units="xy", offsets=xy[nh:][self.new],
                        offset_transform=ax.transData, facecolors="none",
                        edgecolors=NEW_OUTLINE, linewidths=1.5 * lw, zorder=4,
                    )
                )  # fmt: skip

    def _draw_cell(self, ax, view: str, lw: float) -> None:
        """The periodic cell's twelve edges, projected (thin dashes)."""
        a, b, c = self.cell
        corners = [i * a + j * b + k * c for i in (0, 1) for j in (0, 1) for k in (0, 1)]
        edges = [(p, q) for p in range(8) for q in range(p + 1, 8) if bin(p ^ q).count("1") == 1]
        cols = (0, 1) if view == "top" else (0, 2)
        for p, q in edges:
            ax.plot([corners[p][cols[0]], corners[q][cols[0]]],
                    [corners[p][cols[1]], corners[q][cols[1]]],
                    color="0.7", lw=0.6 * lw, ls=(0, (3, 2)), zorder=0)  # fmt: skip


def _frame_axes(ax, xlim: Sequence[float], ylim: Sequence[float]) -> None:
    ax.set_xlim(*xlim)
    ax.set_ylim(*ylim)
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xticks([])
    ax.set_yticks([])
    for side in ax.spines.values():
        side.set_color("0.85")


def _scale_bar(ax, xlim: Sequence[float], ylim: Sequence[float], fontsize: float) -> None:
    """A 5 Å bar in the lower left corner (the room was left free by the limits)."""
    x0 = xlim[0] + 0.6
    y0 = ylim[0] + 0.55
    ax.plot([x0, x0 + SCALE_BAR], [y0, y0], color="0.1", lw=2.0, solid_capstyle="butt",
            zorder=5)  # fmt: skip
    ax.text(x0 + SCALE_BAR + 0.4, y0, f"{SCALE_BAR:g} Å", va="center", ha="left",
            fontsize=fontsize, color="0.1", zorder=5)  # fmt: skip


def _legend_handles(
    labels: Sequence[str], host_symbols: Sequence[str], new: str | None = None
) -> list:
    """Legend entries: guest colours, fill patterns, the outline (labelled ``new``), host."""
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch

    handles = []
    heads = sorted({_split_label(lab)[0] for lab in labels}, key=_label_order)
    for head in heads:
        handles.append(Line2D([], [], ls="", marker="o", ms=9, mfc=group_colour(head),
                              mec="0.15", mew=0.6, label=head))  # fmt: skip
    tails = sorted({t for lab in labels if (t := _split_label(lab)[1]) is not None})
    for tail in tails:
        hatch = _HATCH.get(tail, _OTHER_HATCH)
        handles.append(Patch(facecolor="0.85", edgecolor="0.15", hatch=hatch or None, lw=0.6,
                             label=f"{tail} ({'hatched' if hatch else 'solid'})"))  # fmt: skip
    if new:
        handles.append(Line2D([], [], ls="", marker="o", ms=11, mfc="none", mec=NEW_OUTLINE,
                              mew=1.5, label=new))  # fmt: skip
    colours, _ = _host_style(host_symbols)
    for s, c in zip(host_symbols, colours, strict=True):
        handles.append(Line2D([], [], ls="", marker="o", ms=4, mfc=c, mec="0.35", mew=0.3,
                              label=f"{s} (host)"))  # fmt: skip
    return handles


def _structure_figure(
    atoms: Atoms,
    n_host: int,
    *,
    normal: Sequence[float] | None,
    groups: Sequence[str],
    title: str,
    caution: str | None = None,
    new: Sequence[int] = (),
):
    """The matplotlib Figure of :func:`structure_view` (not saved; the caller closes it)."""
    plt = pyplot()
    scene = _Scene(atoms, n_host, _basis(normal), groups, new, title)
    ext = scene.extent()
    xlim = ext[0]
    side_y = ext[2]
    top_y = (ext[1][0] - _BAR_ROOM, ext[1][1])
    wu = xlim[1] - xlim[0]
    h_side, h_top = side_y[1] - side_y[0], top_y[1] - top_y[0]
    # inches per Å: the panels 4.4 in wide, both together at most 6.2 in high
    s = min(4.4 / wu, 6.2 / (h_side + h_top))
    pw, ps, pt = wu * s, h_side * s, h_top * s
    left, gap, head, foot, legend_w = 0.15, 0.32, 0.62, 0.12, 2.0
    handles = _legend_handles(
        scene.labels, scene.host_symbols, "placed this step" if scene.new else None
    )
    width = left + pw + 0.2 + legend_w
    height = max(head + ps + gap + pt + foot, head + 0.24 * len(handles) + 0.3)
    fig = plt.figure(figsize=(width, height), dpi=DPI)
    y_top = height - head
    ax_side = fig.add_axes([left / width, (y_top - ps) / height, pw / width, ps / height])
    ax_top = fig.add_axes([left / width, (y_top - ps - gap - pt) / height, pw / width, pt / height])
    scene.draw(ax_side, "side")
    scene.draw(ax_top, "top")
    _frame_axes(ax_side, xlim, side_y)
    _frame_axes(ax_top, xlim, top_y)
    ax_side.set_title("side view (looking along the layers)", fontsize=8, loc="left", pad=3)
    ax_top.set_title("top view (looking down the stacking normal)", fontsize=8, loc="left",
                     pad=3)  # fmt: skip
    _scale_bar(ax_top, xlim, top_y, 7)
    fig.suptitle(title, x=left / width, y=1 - 0.12 / height, ha="left", va="top", fontsize=11)
    leg = fig.add_axes([(left + pw + 0.2) / width, foot / height, legend_w / width,
                        (height - head - foot) / height])  # fmt: skip
    leg.axis("off")
    leg.legend(handles=handles, loc="upper left", frameon=False, fontsize=8, borderaxespad=0,
               handletextpad=0.5, labelspacing=0.6, title="guests by where they sit",
               title_fontsize=8, alignment="left")  # fmt: skip
    stamp_caution(fig, caution)
    return fig


def structure_view(
    path: Path,
    atoms: Atoms,
    n_host: int,
    *,
    normal: Sequence[float] | None,
    groups: Sequence[str],
    title: str,
    caution: str | None = None,
    new: Sequence[int] = (),
) -> None:
    """Draw one structure into the PNG ``path``: a side view above a top view (Å, 5 Å bar).

    ``atoms``: host first (``n_host`` atoms, drawn small and muted), then the guests;
    ``normal``: the stacking normal (None: z); ``groups[i]``: guest i's group label (its
    colour); ``new``: guest indices (from 0) placed in this step, outlined; ``caution``:
    stamped along the bottom of the figure.
    """
    fig = _structure_figure(atoms, n_host, normal=normal, groups=groups, title=title,
                            caution=caution, new=new)  # fmt: skip
    try:
        fig.savefig(path)
    finally:
        pyplot().close(fig)
    log.debug("structure view written to %s", path)


def _guests_text(k: int) -> str:
    return f"{k} guest" if k == 1 else f"{k} guests"


def _filling_figure(
    frames: Sequence[tuple[int, Atoms]],
    n_host: int,
    *,
    normal: Sequence[float] | None,
    groups: Sequence[Sequence[str]],
    title: str,
    caution: str | None = None,
):
    """The matplotlib Figure of :func:`filling_sequence` (not saved; the caller closes it)."""
    if not frames:
        raise ValueError("filling sequence: no frame to draw")
    if len(groups) != len(frames):
        raise ValueError(f"filling sequence: {len(groups)} group lists for {len(frames)} frames")
    frames, groups = list(frames), list(groups)
    if len(frames) > MAX_FRAMES:
        keep = set(select_frames(range(len(frames)), MAX_FRAMES))
        log.warning("filling sequence: %d frames given, %d drawn", len(frames), len(keep))
        frames = [f for i, f in enumerate(frames) if i in keep]
        groups = [g for i, g in enumerate(groups) if i in keep]
    plt = pyplot()
    basis = _basis(normal)
    scenes = []
    before = None
    for (step, atoms), labels in zip(frames, groups, strict=True):
        k = len(atoms) - n_host
        new = [] if before is None else list(range(max(0, before), k))
        scenes.append((step, _Scene(atoms, n_host, basis, labels, new, f"step {step}")))
        before = k
    # one scale for every panel: the union of the extents
    ext = np.stack([sc.extent() for _, sc in scenes])
    lo, hi = ext[:, :, 0].min(axis=0), ext[:, :, 1].max(axis=0)
    xlim, side_y, top_y = (lo[0], hi[0]), (lo[2], hi[2]), (lo[1] - _BAR_ROOM, hi[1])
    wu, h_side, h_top = hi[0] - lo[0], side_y[1] - side_y[0], top_y[1] - top_y[0]
    cols = min(len(scenes), 4)
    blocks = math.ceil(len(scenes) / cols)
    s = min(2.1 / wu, 2.3 / h_top, 1.6 / h_side)  # inches per Å
    pw, ps, pt = wu * s, h_side * s, h_top * s
    left, hgap, vgap, head, foot, legend_w = 0.12, 0.14, 0.1, 0.5, 0.1, 1.9
    block_h = 0.26 + ps + vgap + pt + 0.18
    labels = [lab for _, sc in scenes for lab in sc.labels]
    host_symbols = sorted({s for _, sc in scenes for s in sc.host_symbols},
                          key=lambda s: (s not in ("C", "H"), s))  # fmt: skip
    new = "placed since the step before" if any(sc.new for _, sc in scenes) else None
    handles = _legend_handles(labels, host_symbols, new)
    width = left + cols * pw + (cols - 1) * hgap + 0.2 + legend_w
    height = max(head + blocks * block_h + foot, head + 0.24 * len(handles) + 0.3)
    fig = plt.figure(figsize=(width, height), dpi=DPI)
    for j, (step, sc) in enumerate(scenes):
        row, col = divmod(j, cols)
        x0 = left + col * (pw + hgap)
        y_side = height - head - row * block_h - 0.26 - ps
        y_top = y_side - vgap - pt
        ax_s = fig.add_axes([x0 / width, y_side / height, pw / width, ps / height])
        ax_t = fig.add_axes([x0 / width, y_top / height, pw / width, pt / height])
        sc.draw(ax_s, "side", linewidth_scale=0.6)
        sc.draw(ax_t, "top", linewidth_scale=0.6)
        _frame_axes(ax_s, xlim, side_y)
        _frame_axes(ax_t, xlim, top_y)
        ax_s.set_title(f"step {step} · {_guests_text(sc.guests)}", fontsize=8, pad=3)
        if j == 0:
            _scale_bar(ax_t, xlim, top_y, 6)
    fig.suptitle(title, x=left / width, y=1 - 0.1 / height, ha="left", va="top", fontsize=11)
    fig.text(left / width, 1 - 0.34 / height,
             "each step: side view above, top view below; outlined: placed since the step "
             "before", fontsize=7, color="0.35", ha="left", va="top")  # fmt: skip
    lx = left + cols * pw + (cols - 1) * hgap + 0.2
    leg = fig.add_axes([lx / width, foot / height, legend_w / width,
                        (height - head - foot) / height])  # fmt: skip
    leg.axis("off")
    leg.legend(handles=handles, loc="upper left", frameon=False, fontsize=8, borderaxespad=0,
               handletextpad=0.5, labelspacing=0.6, title="guests by where they sit",
               title_fontsize=8, alignment="left")  # fmt: skip
    stamp_caution(fig, caution)
    return fig


def filling_sequence(
    path: Path,
    frames: Sequence[tuple[int, Atoms]],
    n_host: int,
    *,
    normal: Sequence[float] | None,
    groups: Sequence[Sequence[str]],
    title: str,
    caution: str | None = None,
) -> None:
    """Draw the chosen steps into the PNG ``path``: per step a small side view above a small top
    view, all on one scale (Å, 5 Å bar), titled "step N · k guests".

    ``frames``: ``(step, atoms)`` in order (at most :data:`MAX_FRAMES`; more are thinned with
    :func:`select_frames`), host first in each; ``groups[j][i]``: the group label of guest i in
    frame j; the guests a frame has beyond the frame before it are outlined (the first frame
    has none outlined). ``caution`` is stamped along the bottom of the figure.
    """
    fig = _filling_figure(frames, n_host, normal=normal, groups=groups, title=title,
                          caution=caution)  # fmt: skip
    try:
        fig.savefig(path)
    finally:
        pyplot().close(fig)
    log.debug("filling sequence written to %s", path)
