"""Quality control: independent measurements of a build, the pass/fail verdict and the HTML report.

Pure kernels (layer 1):

``blockmatch``  NCC block matching on a grid (seams)
``seams``       residual of two placed tiles over their overlap
``zchain``      per-block chain solve along z; each plane's deviation from where its neighbours put it
``straighten``  oblique structure straightened by the aligner, from its stored transforms
``glossary``    one-line meanings of every flag and total

Stage (layer 4):

``planes``      planes of the written or lazy volume at a chosen level, read by window
``matching``    the probe's block matching between two planes' windows (two passes, blocks transformed once)
``probe``       the alignment-error probe's pair tasks: block shifts per pair of planes, stored with fingerprints
``runs``        its run tasks: each plane's jitter from the stored shifts, in runs of planes
``measure``     seam measurements per section (at most a few tiles held) and the frame conversions
``metrics``     the metrics document (``DIR/qc/metrics.json``, schema in its docstring) and CSV tables
``thresholds``  the ``--fail-on`` syntax and the default bars
``thumbnails``  scale-bar lengths and the plane thumbnails (no matplotlib)
``plots``       the figures (scale bars in nm on image panels)
``figures``     which figures to draw, each kept by a key of what it shows
``report``      the HTML report, the stored-metrics re-check
``stage``       :func:`~stackbuild.qc.stage.run`, the stage entry point
"""
