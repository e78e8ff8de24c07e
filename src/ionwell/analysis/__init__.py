"""After the loop: tables, the guest reference, every figure, the HTML report.

* :mod:`.tables` — the guest reference, the analysis settings and every table of a campaign
  (reads and writes; calls the plots, draws nothing itself);
* :mod:`.plots` — every figure ionwell draws (the only place that imports matplotlib):
  :mod:`.plots.charts` (analysis and comparison charts), :mod:`.plots.structures` (structure
  views, filling sequence), :mod:`.plots.common` (canvas, resolution, caution stamp);
* :mod:`.report` — the self-contained HTML report of one or more campaigns.
"""
