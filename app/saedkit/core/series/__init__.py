"""Frame series and 4-D scans: lazy readers, per-frame measurement, maps.

- :mod:`~saedkit.core.series.reader`: :func:`open_series` describes a folder,
  multi-page TIFF, MRC stack, ``.npy`` array or HDF5 dataset as a
  :class:`FrameSeries`, read block by block (``FrameSeries.to_dask``).
- :mod:`~saedkit.core.series.frames`: :func:`analyse_frames` measures a block
  (centre tracked, mask and phases reused) into :class:`FrameResult` records.
- :mod:`~saedkit.core.series.maps`: :func:`calculate_series_maps` arranges the
  results on the scan grid; HDF5 writing and reading.
- :mod:`~saedkit.core.series.virtual`: :func:`calculate_virtual_images`, the
  virtual bright- and dark-field images of a scan about a fixed centre, streamed.
- :mod:`~saedkit.core.series.rotation`: :func:`find_rotation_axis`, the
  rotation axis of a 3D-ED rotation series from how long its spots last.

The Dask orchestration (chunks, resume, cluster) is :mod:`saedkit.series`.
"""

from saedkit.core.series.frames import (FrameResult, SeriesOptions, analyse_frames, calculate_rotation_period_deg,
                                        calculate_series_mask, calculate_virtual_detector_sums)
from saedkit.core.series.maps import SeriesMaps, calculate_series_maps, read_series_maps, write_series_maps
from saedkit.core.series.reader import FrameSeries, open_series, split_dataset_path
from saedkit.core.series.rotation import RotationAxis, find_rotation_axis
from saedkit.core.series.virtual import calculate_virtual_images

__all__ = ["FrameSeries", "open_series", "split_dataset_path", "SeriesOptions", "FrameResult", "analyse_frames",
           "calculate_rotation_period_deg", "calculate_series_mask", "calculate_virtual_detector_sums", "SeriesMaps", "calculate_series_maps",
           "write_series_maps", "read_series_maps", "calculate_virtual_images",
           "RotationAxis", "find_rotation_axis"]
