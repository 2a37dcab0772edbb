"""Image files in and out: PNG, TIFF (8/16-bit, float, stacks) and NumPy ``.npy``, with their scaling.

Reading turns a file into float64 values and remembers how: integer pixels
``v`` become ``(v - low) / (high - low)`` for a range ``[low, high]`` (the
full range of the integer type unless declared), floating-point files are
taken as they are. Writing inverts the same scaling into the same format and
bit depth, so a result goes back where its input came from. Layouts: a grey
image ``(H, W)``, a colour image ``(C, H, W)`` (stored ``(H, W, C)`` in
PNG/TIFF), a stack of frames ``(N, H, W)`` (multi-page TIFF or a 3-D
``.npy``). Readers are well-kept libraries: imageio for PNG, tifffile for
TIFF, numpy for ``.npy``.
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Literal

import numpy as np

#: File suffixes read and written, by reader.
PNG_SUFFIXES = (".png",)
TIFF_SUFFIXES = (".tif", ".tiff")
NPY_SUFFIXES = (".npy",)
SUFFIXES = PNG_SUFFIXES + TIFF_SUFFIXES + NPY_SUFFIXES

Layout = Literal["grey", "colour", "stack"]


class ImageFileError(ValueError):
    """A file that cannot be used: unreadable, not an image, values outside a declared range."""


def sha256(path: str | Path) -> str:
    """SHA-256 of a file's bytes, in hex."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


@dataclass(frozen=True)
class ImageFile:
    """An image file read as float64 values, with what is needed to write a result alike.

    Attributes
    ----------
    values : numpy.ndarray
        float64; ``(H, W)``, ``(C, H, W)`` or ``(N, H, W)`` as ``layout`` says.
    layout : {"grey", "colour", "stack"}
    suffix : str
        The file's suffix, lower case (``".png"``, ``".tif"``, ``".npy"``).
    dtype : str
        The stored pixel type (``"uint8"``, ``"uint16"``, ``"float32"``...).
    value_range : tuple of float or None
        ``(low, high)`` of the integer scaling; None for floating-point files.
    path : str
    checksum : str
        SHA-256 of the file.
    """

    values: np.ndarray
    layout: Layout
    suffix: str
    dtype: str
    value_range: tuple[float, float] | None
    path: str
    checksum: str

    @property
    def frame_shape(self) -> tuple[int, int]:
        """``(H, W)`` of one image."""
        return tuple(self.values.shape[-2:])

    def scaling(self) -> str:
        """How stored values map to the float values, in words."""
        if self.value_range is None:
            return f"{self.dtype} values used as they are"
        low, high = self.value_range
        return f"{self.dtype} value v read as (v - {low:g}) / {high - low:g}"

    def storing(self) -> str:
        """How a result's float values ``x`` are stored in this file's format, in words."""
        if self.value_range is None:
            return f"{self.dtype} values as computed, no scaling"
        low, high = self.value_range
        return f"{self.dtype} value round({low:g} + x * {high - low:g}), clipped to [{low:g}, {high:g}]"

    def describe(self) -> dict:
        """JSON-ready facts about the file (no pixel values)."""
        return {
            "path": self.path,
            "sha256": self.checksum,
            "format": self.suffix.lstrip("."),
            "dtype": self.dtype,
            "shape": list(self.values.shape),
            "layout": self.layout,
            "range": None if self.value_range is None else list(self.value_range),
            "scaling": self.scaling(),
        }


def _read_raw(file: Path, what: str) -> np.ndarray:
    suffix = file.suffix.lower()
    if suffix not in SUFFIXES:
        raise ImageFileError(
            f"{what} {str(file)!r} has suffix {file.suffix!r}; expected one of {', '.join(SUFFIXES)}"
        )
    try:
        if suffix in NPY_SUFFIXES:
            return np.load(file, allow_pickle=False)
        if suffix in TIFF_SUFFIXES:
            import tifffile

            with tifffile.TiffFile(file) as tiff:
                series = tiff.series[0]
                raw = series.asarray()
                # Colour samples stored as separate planes ("SYX") come channel-first.
                return np.moveaxis(raw, 0, -1) if series.axes == "SYX" else raw
        import imageio.v3 as iio

        with warnings.catch_warnings():
            # Plugin discovery on a file that is not an image warns about deprecated plugins.
            warnings.simplefilter("ignore", DeprecationWarning)
            return iio.imread(file)
    except Exception as error:  # noqa: BLE001 - any reader failure means the file is not an image
        reason = " ".join(str(error).split()) or type(error).__name__
        raise ImageFileError(f"{what} {str(file)!r} is not a readable image: {reason}") from None


def _layout(raw: np.ndarray, suffix: str, file: Path, what: str) -> tuple[np.ndarray, Layout]:
    if raw.ndim == 2:
        return raw, "grey"
    if raw.ndim == 3 and suffix not in NPY_SUFFIXES and raw.shape[-1] in (3, 4):
        if raw.shape[-1] == 4:
            raise ImageFileError(f"{what} {str(file)!r} has an alpha channel; save it as RGB or grey")
        return np.moveaxis(raw, -1, 0), "colour"
    if raw.ndim == 3:
        return raw, "stack"
    raise ImageFileError(
        f"{what} {str(file)!r} has shape {raw.shape}; expected (H, W), (H, W, 3) colour or an (N, H, W) stack"
    )


def read_image(path: str | Path, *, what: str = "image", value_range: tuple[float, float] | None = None) -> ImageFile:
    """Read an image file into float64 values and its scaling.

    Parameters
    ----------
    path : str or Path
        A PNG, TIFF or ``.npy`` file.
    what : str
        How messages name the file (``"data"``, ``"mask"``...).
    value_range : tuple of float, optional
        ``(low, high)``: the range the integer pixel values were recorded in
        (a 12-bit camera stores 0..4095 in a 16-bit file). Default: the full
        range of the integer type. Not allowed for floating-point files.

    Returns
    -------
    ImageFile

    Raises
    ------
    ImageFileError
        If the file does not exist, is not an image of a supported layout,
        holds non-finite or non-real values, or holds integers outside the
        declared range.
    """
    file = Path(path)
    if not file.is_file():
        raise ImageFileError(f"{what} file {str(file)!r} does not exist")
    raw = np.asarray(_read_raw(file, what))
    if raw.dtype == bool or raw.dtype.kind not in "iuf":
        raise ImageFileError(f"{what} {str(file)!r} has pixel type {raw.dtype}; expected integers or floats")
    values, layout = _layout(raw, file.suffix.lower(), file, what)
    if raw.dtype.kind == "f":
        if value_range is not None:
            raise ImageFileError(
                f"a value range applies to integer files; {what} {str(file)!r} holds {raw.dtype} values"
            )
        if not np.isfinite(values).all():
            raise ImageFileError(f"{what} {str(file)!r} has non-finite values (NaN or inf)")
        scale = None
        floats = values.astype(np.float64)
    else:
        info = np.iinfo(raw.dtype)
        low, high = (float(info.min) if info.min < 0 else 0.0, float(info.max)) if value_range is None else value_range
        if not (np.isfinite(low) and np.isfinite(high) and high > low):
            raise ImageFileError(f"the value range must be finite with low < high, got [{low:g}, {high:g}]")
        smallest, largest = float(values.min()), float(values.max())
        if smallest < low or largest > high:
            raise ImageFileError(
                f"{what} {str(file)!r} ({raw.dtype}) has values from {smallest:g} to {largest:g}, outside the "
                f"declared range [{low:g}, {high:g}]"
            )
        scale = (low, high)
        floats = (values.astype(np.float64) - low) / (high - low)
    return ImageFile(floats, layout, file.suffix.lower(), str(raw.dtype), scale, str(file), sha256(file))


def encode(values: np.ndarray, like: ImageFile) -> tuple[np.ndarray, int]:
    """Float values in ``like``'s stored type and scaling, and how many were clipped.

    Integer formats: ``v = round(low + x (high - low))`` clipped to
    ``[low, high]`` (the number of clipped values is returned); floating
    formats: ``x`` in the stored float type, unclipped.
    """
    if like.value_range is None:
        return values.astype(like.dtype), 0
    low, high = like.value_range
    stored = np.rint(low + values * (high - low))
    clipped = int(np.count_nonzero((stored < low) | (stored > high)))
    return np.clip(stored, low, high).astype(like.dtype), clipped


def write_image(path: str | Path, values: np.ndarray, like: ImageFile) -> int:
    """Write float ``values`` (``like``'s layout) in ``like``'s format and bit depth.

    The format follows ``path``'s suffix, which must be ``like``'s kind of
    file (PNG, TIFF or ``.npy``). Returns the number of clipped values (see
    :func:`encode`).
    """
    stored, clipped = encode(values, like)
    if like.layout == "colour":
        stored = np.moveaxis(stored, 0, -1)
    suffix = Path(path).suffix.lower()
    if suffix in NPY_SUFFIXES:
        with open(path, "wb") as handle:
            np.save(handle, stored, allow_pickle=False)
    elif suffix in TIFF_SUFFIXES:
        import tifffile

        tifffile.imwrite(path, stored, photometric="rgb" if like.layout == "colour" else "minisblack")
    else:
        import imageio.v3 as iio

        iio.imwrite(path, stored, extension=".png")
    return clipped
