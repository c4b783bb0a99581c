"""Rendering: raw tiles -> registered volume, lazily (dask) or written as OME-Zarr 0.5.

The sampler and the tile reader it is fed by sit below the stages
(:mod:`stackbuild.sampler`, :mod:`stackbuild.tiles`).

``canvas``    compute_canvas: the output extent in the aligned frame
``contrast``  optional per-section intensity normalisation
``reduce``    the 2x2 reducers of the pyramid
``lazy``      lazy_volume / open_volume: the volume as a dask array
``ngff``      OME-Zarr 0.5 metadata and the pixel-centre convention
``write``     render_volume: the render stage
``channels``  render_channels: the marker-channel pyramids beside the EM
"""
