"""Molecular marker channels: registration to the EM by mutual information, and rendering.

``mutual_info``  the pure kernels (measure, registration);
``stage``        :func:`run_channels`, one stored ``channels`` record per section;
``render``       :func:`render_channels`, ``volume.zarr/channels/<name>`` beside the EM.
"""
