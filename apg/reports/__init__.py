"""Every figure and report apg writes, in one place; the only part of apg that imports matplotlib.

The plotting backend is chosen here, once, before any submodule imports ``matplotlib.pyplot``: Agg, which draws
into files and needs no display (training runs on clusters and in CI).

* :mod:`apg.reports.figures`: the shared look and the figures other tools reuse (held-out trajectories for
  TensorBoard, the gradient profile);
* :mod:`apg.reports.animation`: a GIF of one episode, drawn from each system's own sketch;
* :mod:`apg.reports.evaluation_report`: apg-eval's figures and ``report.md``;
* :mod:`apg.reports.compare_report`: apg-compare's CSV files, figures, TensorBoard events and ``report.md``;
* :mod:`apg.reports.multirun_report`: apg-aggregate's ``summary.csv``, ``summary.md`` and ``summary.png``.

The numbers these files show are computed elsewhere (:mod:`apg.evaluation`, :mod:`apg.compare`,
:mod:`apg.aggregate`); nothing here recomputes them.
"""

import matplotlib

matplotlib.use("Agg")
