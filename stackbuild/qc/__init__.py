"""Quality control: independent measurements of a build, the pass/fail verdict and the HTML report.

``blockmatch``  NCC block matching on a grid (pure kernel)
``seams``       residual of two placed tiles over their overlap (pure kernel)
``planes``      planes of the written or lazy volume at a chosen level
``measure``     seam and section-to-section measurements of a build
``metrics``     the metrics document (``DIR/qc/metrics.json``, schema in its docstring) and CSV tables
``thresholds``  the ``--fail-on`` syntax
``plots``       the figures
``report``      :func:`~stackbuild.qc.report.run_report`, the stage entry point
"""
