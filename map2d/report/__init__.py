"""The report: figures (:mod:`map2d.report.figures`) and the self-contained ``report.html``
(:mod:`map2d.report.html`, :func:`map2d.report.html.write_report`).

Nothing is imported here, so ``import map2d.report`` does not load matplotlib.
"""
