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
``colours``     the colour ramp (a table of RGB stops), accents and the no-data colour
``svg``         SVG written as text: shapes, axes, colour bars, scale bars, embedded PNG panels
``thumbnails``  scale-bar lengths and the plane thumbnails (PNG)
``plots``       the charts as SVG (error per plane and region, tile maps, displacement field, landmarks)
``panels``      the image panels as SVG with PNG pixels (re-slices, worst section, marker overlays)
``figures``     which figures to draw, each kept by a key of what it shows
``report``      the HTML report, the stored-metrics re-check
``stage``       :func:`~stackbuild.qc.stage.run`, the stage entry point
"""
