"""Virtual bright-field and annular dark-field images of a whole scan, streamed block by block.

The quick look at a 4-D scan before (or instead of) measuring every frame:
each block of frames is read, summed inside the virtual detectors about one
fixed centre, and dropped, so memory is set by the block size, not the scan.
"""

from __future__ import annotations

import numpy as np

from saedkit.core.series.frames import calculate_virtual_detector_sums

__all__ = ["calculate_virtual_images"]


def _block_sums(block: np.ndarray, centre_xy, bf_r: float, df_radii) -> np.ndarray:
    c = np.tile(np.asarray(centre_xy, float), (len(block), 1))
    bf, df = calculate_virtual_detector_sums(block, c, bright_field_radius_px=bf_r, dark_field_radii_px=df_radii)
    return np.stack([bf, df], axis=1)


def calculate_virtual_images(series, *, centre_xy, bright_field_radius_px: float,
                             dark_field_radii_px: tuple[float, float], frames_per_chunk: int = 16,
                             scheduler: str = "synchronous") -> tuple[np.ndarray, np.ndarray]:
    """Virtual bright-field and annular dark-field images about a fixed centre.

    Parameters
    ----------
    series : FrameSeries
    centre_xy : [x, y]
        Centre of the virtual detectors on every frame (x = column).
    bright_field_radius_px : float
        Disc radius of the bright-field detector.
    dark_field_radii_px : (inner, outer)
        Annulus of the dark-field detector.
    frames_per_chunk : int
        Frames read at a time (the memory held per worker).
    scheduler : str
        Dask scheduler ("synchronous", "threads", "processes").

    Returns
    -------
    bright_field, dark_field : arrays of the scan's shape
        Sums of the pixel values inside each detector.

    Examples
    --------
    >>> import numpy as np, tempfile, os
    >>> from saedkit.core.series.reader import open_series
    >>> path = os.path.join(tempfile.mkdtemp(), "scan.npy")
    >>> np.save(path, np.ones((2, 3, 16, 16), np.float32))
    >>> bf, df = calculate_virtual_images(open_series(path), centre_xy=(7.5, 7.5), bright_field_radius_px=1.0,
    ...                                   dark_field_radii_px=(3.0, 5.0))
    >>> bf.shape, float(bf[0, 0])
    ((2, 3), 4.0)
    """
    import dask.array as da

    arr = series.to_dask(frames_per_chunk)
    inner, outer = (float(v) for v in dark_field_radii_px)
    sums = da.map_blocks(_block_sums, arr, np.asarray(centre_xy, float), float(bright_field_radius_px),
                         (inner, outer), dtype=np.float64, drop_axis=(1, 2), new_axis=1,
                         chunks=(arr.chunks[0], (2,)))
    out = sums.compute(scheduler=scheduler)
    return out[:, 0].reshape(series.scan_shape), out[:, 1].reshape(series.scan_shape)
