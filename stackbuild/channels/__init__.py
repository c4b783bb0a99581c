"""Molecular marker channels: registration to the EM by mutual information, and rendering.

``mutual_info``  the pure kernels (measure, registration);
``stage``        :func:`run_channels`, one stored ``channels`` record per section.

The marker pyramids (``volume.zarr/channels/<name>``) are written by the render
stage (:mod:`stackbuild.render.channels`).
"""
