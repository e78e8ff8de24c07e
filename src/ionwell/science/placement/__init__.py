"""Where the next guest goes: admissible region, wells of the potential map, placement rules.

A pure package: it takes a :class:`~ionwell.science.grid.Grid` in the potential convention (volts,
nuclei are maxima, see :func:`ionwell.science.grid.orient`) and ASE ``Atoms`` in the same Cartesian
frame, and returns a :class:`Decision`. It reads and writes no files and runs no engine; the
``screened`` rule gets its energies from a function the caller passes in. Its modules:

* :mod:`~ionwell.science.placement.region` — exclusion radii, the host envelope, galleries,
  user boxes and spheres: the admissible region as a mask and as a test of positions;
* :mod:`~ionwell.science.placement.wells` — the wells (:class:`Site`): local minima, refinement,
  merging, order, near-degeneracy;
* :mod:`~ionwell.science.placement.rules` — the rules ``deepest``, ``thermal``, ``screened``
  (one function each, in the table :data:`RULES`), :func:`choose`, :func:`next_untried`;
* :mod:`~ionwell.science.placement.decide` — :func:`place` (one map, one settings model) and
  :func:`decide` (a campaign step: orientation, then :func:`place`), the :class:`Decision`.

Vocabulary:

* **admissible region** — grid points at least ``exclusion[element]`` (Å) from every atom
  (all periodic images on periodic grid axes), unless ``within`` is None no farther than
  ``within`` (Å) from at least one atom of the envelope (by default: all atoms), and inside the
  :class:`Region` when one is given: in a gallery of a layered host (strictly between two
  adjacent layers, see :func:`ionwell.science.host.detect_layers`) and in at least one user box or
  sphere when any are given.
* **well** — a local minimum of the potential among admissible points: no admissible neighbour
  (26-neighbourhood, periodic axes wrapped) is lower. A flat patch of equal values counts once,
  and only when nothing next to it is lower. Each well is refined below the grid spacing; wells
  closer than ``merge`` Å (minimum image) are one well, the deeper. A well whose neighbourhood
  (its 3×3×3 grid block) touches the edge of the admissible region or of the grid is marked
  ``edge``: it is the lowest point there, but the potential may keep falling beyond the edge.
  ``boundary`` says when the edge sets the site: ``"grid"`` when the block leaves the grid on a
  non-periodic axis (the site is on the grid box's face; this wins when both apply),
  ``"region"`` when an inadmissible point of the block is lower than the well — the potential
  keeps falling across the admissible region's boundary (an exclusion radius, the ``within``
  envelope, a gallery margin, the user boxes and spheres), so the region, not a minimum of the
  potential, places the site. A true minimum that merely lies next to the boundary (every
  inadmissible neighbour higher) is ``edge`` but has no ``boundary``.
* **order** of wells — ascending refined potential; potentials equal to within 1 nV are tied
  and the tie goes to the lower grid index ``(i, j, k)`` of the well's grid point. Every rule
  that walks the wells "in order" uses this order, so a decision is deterministic for a given
  grid, structure and settings.
* **near-degenerate** wells — every well within ``degenerate`` V of the deepest, when there are
  at least two such wells (``Site.degenerate``). They are reported, not reordered: ``deepest``
  still takes the first in the order above.

Placement rules (``deepest``, ``thermal``, ``screened``, and ``per_step`` > 1): see
:mod:`ionwell.science.placement.rules`, where each is one function of the table ``RULES``.

Rejected sites (the loop's ``reject_site`` remedy): when a step computed with the chosen sites
fails a check, :func:`next_untried` strikes out every site tried so far and takes the next wells
of the same decision in depth order, greedily keeping the separation — whatever the rule, so the
fallback never draws new random numbers and replays exactly.
"""

from ionwell.science.placement.decide import Decision, PlaceSettings, decide, place
from ionwell.science.placement.region import (
    EXCLUSION_FACTOR,
    Galleries,
    Region,
    admissible_mask,
    default_exclusion,
    region_mask,
)
from ionwell.science.placement.rules import (
    RULES,
    Choice,
    EnergyFunction,
    choose,
    known_energies,
    next_untried,
)
from ionwell.science.placement.wells import Site, find_wells

__all__ = [
    "EXCLUSION_FACTOR",
    "RULES",
    "Choice",
    "Decision",
    "EnergyFunction",
    "Galleries",
    "PlaceSettings",
    "Region",
    "Site",
    "admissible_mask",
    "choose",
    "decide",
    "default_exclusion",
    "find_wells",
    "known_energies",
    "next_untried",
    "place",
    "region_mask",
]
