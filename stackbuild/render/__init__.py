"""Rendering: raw tiles -> registered volume, lazily (dask) or written as OME-Zarr 0.5.

``sampler``   render_region: one region of one section through the stored transforms
``tiles``     reading tiles, the per-process cache of prepared tiles
``canvas``    compute_canvas: the output extent in the aligned frame
``contrast``  optional per-section intensity normalisation
``reduce``    the 2x2 reducers of the pyramid
``lazy``      lazy_volume / open_volume: the volume as a dask array
``ngff``      OME-Zarr 0.5 metadata and the pixel-centre convention
``write``     render_volume: the render stage
"""
