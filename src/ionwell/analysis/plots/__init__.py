"""Every figure ionwell draws (matplotlib, Agg). No other module of the project imports matplotlib.

Each drawing function takes numbers that are already prepared (tables, diagnostics, structures;
energies eV, lengths Å, charges e, voltages V) and draws one PNG: into a file, or, for the
report, into bytes. Deciding what to show stays with the callers
(:mod:`ionwell.analysis.tables`, :mod:`ionwell.analysis.report`); drawing stays here.

* :mod:`.common` — what every figure shares: the Agg pyplot, the resolution, saving, and the
  caution stamped along the bottom of a figure so a PNG that travels alone still carries it;
* :mod:`.charts` — the charts: the analysis figures of one campaign (hull, voltage, occupancy
  map, stacking, rim, charges, DOS) and the report's comparison figures of several campaigns;
* :mod:`.structures` — pictures of the structures: per-step side and top views and the
  filling sequence.

Charts and structure pictures are two modules rather than one because they share only the
canvas: charts plot numbers on axes, structure pictures project atoms (with their own colours,
scale bar and legend) and would double the length of one file.

matplotlib is imported inside the functions, so importing this package stays cheap (parsing the
workflow imports the analysis only when a rule runs).
"""
