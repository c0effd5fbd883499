"""Reading time-lapse stacks: ImageJ hyperstacks, OME-TIFF, plain multi-page TIFF, a folder of
one-file-per-timepoint TIFFs, a zarr array, or a numpy array.

Every input is normalised to a :class:`Stack`: the image data (left on disk, memory-mapped or
zarr-backed, and read one timepoint at a time), its axes (``T``, optional ``Z``, optional ``C``,
``Y``, ``X``, in that order), the pixel size in µm, the time between frames in hours and the
channel names. Values come from the file's metadata when present and can be overridden by the
user; a guessed value is reported in :attr:`Stack.warnings`.
"""

from __future__ import annotations

import math
import os
import re
import threading
import warnings as _warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from .errors import InputError, MetadataError

CANONICAL_AXES = "TZCYX"
TIFF_SUFFIXES = (".tif", ".tiff", ".btf", ".tf8", ".ome.tif", ".ome.tiff")

# length units as written in TIFF/ImageJ/OME metadata, in µm
_UNIT_UM = {
    "um": 1.0, "µm": 1.0, "μm": 1.0, "micron": 1.0, "microns": 1.0, "micrometer": 1.0,
    "micrometre": 1.0, "\\u00b5m": 1.0, "nm": 1e-3, "nanometer": 1e-3, "mm": 1e3,
    "millimeter": 1e3, "cm": 1e4, "centimeter": 1e4, "m": 1e6, "meter": 1e6, "inch": 25400.0,
}
# time units spelt out (OME-Zarr uses UDUNITS-2 names), in hours
_UNIT_H_LONG = {"millisecond": 1 / 3.6e6, "microsecond": 1 / 3.6e9, "nanosecond": 1 / 3.6e12,
                "second": 1 / 3600, "minute": 1 / 60, "hour": 1.0, "day": 24.0}
# time units as written in OME metadata, in hours
_UNIT_H = {"s": 1 / 3600, "sec": 1 / 3600, "second": 1 / 3600, "ms": 1 / 3.6e6, "min": 1 / 60,
           "minute": 1 / 60, "h": 1.0, "hour": 1.0, "hr": 1.0, "d": 24.0, "day": 24.0}


@dataclass
class Stack:
    """A time-lapse image with its physical scale.

    Attributes
    ----------
    data : array-like
        The image, axes as in :attr:`axes` (numpy array, memory map or zarr array).
    axes : str
        Subset of ``"TZCYX"`` in that order; always holds ``T``, ``Y`` and ``X``.
    pixel_size_um : tuple of float
        ``(x, y, z)`` pixel size in µm; ``z`` is NaN for 2D+t stacks.
    interval_h : float
        Time between frames in hours.
    channel_names : list of str
        One name per channel (``["ch0"]`` for a single-channel stack).
    path : Path or None
        The file or folder read.
    warnings : list of str
        Values that were guessed or overridden.
    """

    data: Any
    axes: str
    pixel_size_um: tuple[float, float, float]
    interval_h: float
    channel_names: list[str]
    path: Path | None = None
    warnings: list[str] = field(default_factory=list)
    source_format: str = "array"
    _timepoint: Callable[[int], np.ndarray] | None = field(default=None, repr=False)
    _close: Callable[[], None] | None = field(default=None, repr=False)
    #: serialises the reads of data that is not a numpy array or memory map (zarr arrays, e.g.
    #: the view of a compressed TIFF, whose store reads through one file handle); arrays, memory
    #: maps and one-file-per-timepoint folders are read by several threads at once
    _lock: Any = field(default_factory=threading.Lock, repr=False, compare=False)

    # -- shape ----------------------------------------------------------------------------------
    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(s) for s in self.data.shape)

    @property
    def n_frames(self) -> int:
        return self.shape[self.axes.index("T")]

    @property
    def has_z(self) -> bool:
        return "Z" in self.axes

    @property
    def n_channels(self) -> int:
        return self.shape[self.axes.index("C")] if "C" in self.axes else 1

    @property
    def shape_yx(self) -> tuple[int, int]:
        return self.shape[self.axes.index("Y")], self.shape[self.axes.index("X")]

    @property
    def nbytes(self) -> int:
        return int(np.prod(self.shape)) * np.dtype(self.data.dtype).itemsize

    @property
    def name(self) -> str:
        return self.path.name if self.path is not None else "array"

    def times_h(self) -> np.ndarray:
        """Time of every frame since the first, in hours."""
        return np.arange(self.n_frames, dtype=float) * self.interval_h

    # -- channels -------------------------------------------------------------------------------
    def channel_index(self, channel: int | str | None) -> int:
        """Index of a channel given by index or name (``None``: the first)."""
        if channel is None:
            return 0
        if isinstance(channel, str) and not channel.strip().isdigit():
            names = [n.lower() for n in self.channel_names]
            if channel.lower() in names:
                return names.index(channel.lower())
            raise InputError(f"no channel named '{channel}' (channels: {', '.join(self.channel_names)})",
                             self.path, "give a channel name or a 0-based index")
        idx = int(channel)
        if not 0 <= idx < self.n_channels:
            raise InputError(f"channel index {idx} is out of range (the stack has {self.n_channels} channel(s): "
                             f"{', '.join(self.channel_names)})", self.path, "give a 0-based channel index")
        return idx

    # -- data -----------------------------------------------------------------------------------
    def timepoint(self, t: int) -> np.ndarray:
        """All data of timepoint ``t`` (axes: the stack's axes without ``T``), read from disk."""
        if not 0 <= t < self.n_frames:
            raise IndexError(f"frame {t} out of range 0..{self.n_frames - 1}")
        try:
            if self._timepoint is not None:
                return np.asarray(self._timepoint(t))
            index = [slice(None)] * len(self.axes)
            index[self.axes.index("T")] = t
            if isinstance(self.data, np.memmap):
                view = self.data[tuple(index)]
                arr = _read_mapped(self.data, view)
                if arr is None:
                    arr = np.array(view)  # a copy, so that the mapped pages can go
                    _drop_mapped_pages(self.data, view)
                if not arr.dtype.isnative:  # a big-endian file: the values in this machine's order
                    arr = arr.astype(arr.dtype.newbyteorder("="))
                return arr
            if isinstance(self.data, np.ndarray):
                return np.asarray(self.data[tuple(index)])
            with self._lock:
                return np.asarray(self.data[tuple(index)])
        except (InputError, MemoryError):
            raise
        except Exception as exc:  # decoding errors of a truncated or corrupt file
            raise InputError(f"cannot read frame {t} ({type(exc).__name__}: {_first_line(exc)})", self.path,
                             "the file may be truncated or corrupt: copy it again") from None

    def frame(self, t: int, channel: int | str | None = None, native: bool = False) -> np.ndarray:
        """One channel of timepoint ``t``, shape ``(Z, Y, X)`` or ``(Y, X)``.

        As float32, or with ``native=True`` in the stack's own integer type (no copy of a large
        volume; float data is always float32). Raises :class:`InputError` when the frame holds
        NaN or infinite values.
        """
        arr = self.timepoint(t)
        rest = self.axes.replace("T", "")
        if "C" in rest:
            arr = np.take(arr, self.channel_index(channel), axis=rest.index("C"))
        elif channel not in (None, 0, "0") and not (isinstance(channel, str) and channel.lower() in
                                                     [n.lower() for n in self.channel_names]):
            self.channel_index(channel)  # raises a clear error
        if native and arr.dtype.kind in "uib":
            return arr
        out = arr.astype(np.float32, copy=False)
        if out.dtype.kind == "f" and not np.isfinite(out).all():
            raise InputError(f"frame {t} holds NaN or infinite values", self.path,
                             "replace them (e.g. by 0) before the analysis")
        return out

    def close(self) -> None:
        """Release the file handles (the data can no longer be read afterwards)."""
        if self._close is not None:
            self._close()
            self._close = None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def describe(self) -> str:
        """One line: name, shape, scale."""
        px, py, pz = self.pixel_size_um
        z = f", z {pz:g} µm" if self.has_z else ""
        return (f"{self.name}: {self.axes} {'×'.join(map(str, self.shape))} {np.dtype(self.data.dtype).name}, "
                f"{px:g} µm/px{z}, {self.interval_h:g} h/frame, channels {', '.join(self.channel_names)}")


# ----------------------------------------------------------------------------------------------
# public entry points
# ----------------------------------------------------------------------------------------------
def read_stack(source: str | Path | np.ndarray | Stack, *, axes: str | None = None,
               pixel_size_um: float | None = None, z_step_um: float | None = None,
               interval_h: float | None = None, time_axis: str | None = None,
               channel_names: Sequence[str] | None = None) -> Stack:
    """Open a time-lapse stack from a file, a folder of timepoint files, a zarr path or an array.

    Parameters
    ----------
    source : path, array or Stack
        TIFF file (ImageJ hyperstack, OME-TIFF or plain multi-page), folder of one TIFF per
        timepoint, ``.zarr`` folder, or an array (then ``axes`` is required).
    axes : str, optional
        Axes of an array source, letters from ``TZCYX``.
    pixel_size_um, z_step_um, interval_h : float, optional
        Override the metadata (a warning says when they contradict it).
    time_axis : str, optional
        Which axis of the file is time when the file does not say (e.g. ``"Z"`` or ``"Q"``).
    channel_names : sequence of str, optional
        Names for the channels.

    Returns
    -------
    Stack

    Examples
    --------
    >>> import numpy as np
    >>> s = read_stack(np.zeros((3, 8, 8), np.uint16), axes="TYX", pixel_size_um=0.5, interval_h=2)
    >>> s.n_frames, s.pixel_size_um[0], s.interval_h
    (3, 0.5, 2.0)
    """
    if isinstance(source, Stack):
        stack = source
    elif isinstance(source, np.ndarray) or (hasattr(source, "shape") and hasattr(source, "dtype")
                                             and not isinstance(source, (str, Path))):
        if axes is None:
            raise InputError("an array needs its axes (e.g. axes='TZYX')")
        stack = _from_array(source, axes.upper(), time_axis)
    else:
        path = Path(source)
        if not path.exists():
            raise InputError("file or folder not found", path, "check the path")
        if path.is_dir() and (path.suffix.lower() == ".zarr" or (path / ".zarray").exists()
                              or (path / "zarr.json").exists() or (path / ".zgroup").exists()):
            stack = _read_zarr(path, axes, time_axis)
        elif path.is_dir():
            stack = _read_folder(path, time_axis)
        else:
            stack = _read_tiff(path, time_axis)
    _apply_overrides(stack, pixel_size_um, z_step_um, interval_h, channel_names)
    _check(stack)
    for w in stack.warnings:
        _warnings.warn(f"{stack.name}: {w}", StackWarning, stacklevel=2)
    return stack


class StackWarning(UserWarning):
    """A value of the stack was guessed or overridden."""


def from_array(data, axes: str, pixel_size_um: float = 1.0, interval_h: float = 1.0,
               z_step_um: float | None = None, channel_names: Sequence[str] | None = None) -> Stack:
    """A :class:`Stack` around an in-memory array (no guessing warnings)."""
    stack = _from_array(data, axes.upper(), None)
    stack.warnings.clear()
    _apply_overrides(stack, pixel_size_um, z_step_um if z_step_um is not None else (pixel_size_um if "Z" in axes.upper() else None),
                     interval_h, channel_names, quiet=True)
    _check(stack)
    return stack


# ----------------------------------------------------------------------------------------------
# helpers
# ----------------------------------------------------------------------------------------------
def _canonicalise(data, axes: str, time_axis: str | None, path) -> tuple[Any, str, list[str]]:
    """Rename/transpose/squeeze an array so that its axes are a canonical subset of TZCYX."""
    notes: list[str] = []
    axes = axes.upper()
    if len(axes) != len(data.shape):
        raise InputError(f"axes '{axes}' do not match the data's {len(data.shape)} dimensions {tuple(data.shape)}", path)
    if "S" in axes:  # samples: treat as channels
        if "C" in axes:
            raise InputError("image has both samples (RGB) and channels", path, "save it as a plain multi-channel stack")
        axes = axes.replace("S", "C")
    if "Y" not in axes or "X" not in axes:
        raise InputError(f"image axes '{axes}' lack Y or X", path)
    if time_axis:
        ta = time_axis.upper()
        if ta not in axes:
            raise InputError(f"there is no axis '{ta}' to use as time (axes: {axes})", path,
                             "name an existing axis with --time-axis")
        if ta != "T":
            if "T" in axes:
                raise InputError(f"the file already has a time axis; cannot use '{ta}' as time", path)
            axes = axes.replace(ta, "T")
    unknown = [a for a in axes if a not in CANONICAL_AXES]
    if "T" not in axes:
        if len(unknown) == 1:
            axes = axes.replace(unknown[0], "T")
            notes.append(f"the file does not say which axis is time; its only unnamed axis ({unknown[0]}, "
                         f"{data.shape[axes.index('T')]} planes) was taken as time")
            unknown = []
        else:
            shape = dict(zip(axes, data.shape))
            if len(data.shape) == 2:
                raise InputError("this is a single 2D image, not a time-lapse", path,
                                 "give a stack with a time axis")
            raise InputError(f"the stack has no time axis (axes {axes}, shape {tuple(data.shape)}); "
                             f"as read it holds a single timepoint, and a time-lapse is needed" if not unknown else
                             f"ambiguous axes {axes} {tuple(data.shape)}: cannot tell which is time", path,
                             "say which axis is time with --time-axis (e.g. --time-axis Z)"
                             if shape else "")
    # squeeze extra unknown singleton axes; others are ambiguous
    for a in list(unknown):
        i = axes.index(a)
        if data.shape[i] == 1:
            data = data[tuple(0 if j == i else slice(None) for j in range(len(axes)))]
            axes = axes[:i] + axes[i + 1:]
        else:
            raise InputError(f"ambiguous axes {axes} {tuple(data.shape)}: axis {a} is neither time, z, channel, y nor x",
                             path, "save the stack as an ImageJ hyperstack or OME-TIFF with named axes")
    if len(set(axes)) != len(axes):
        raise InputError(f"axes '{axes}' repeat a letter", path)
    order = [axes.index(a) for a in CANONICAL_AXES if a in axes]
    new_axes = "".join(axes[i] for i in order)
    if order != list(range(len(axes))):
        data = _Transposed(data, order)
    return data, new_axes, notes


class _Transposed:
    """A lazy transposed view of an array-like that may not support ``transpose``."""

    def __init__(self, base, order):
        self.base, self.order = base, list(order)
        self.shape = tuple(base.shape[i] for i in order)
        self.dtype = base.dtype
        self.ndim = len(order)

    def __getitem__(self, index):
        if not isinstance(index, tuple):
            index = (index,)
        index = index + (slice(None),) * (self.ndim - len(index))
        base_index = [slice(None)] * self.ndim
        for out_pos, base_pos in enumerate(self.order):
            base_index[base_pos] = index[out_pos]
        arr = np.asarray(self.base[tuple(base_index)])
        kept = [b for o, b in enumerate(self.order) if not isinstance(index[o], (int, np.integer))]
        return np.transpose(arr, np.argsort(np.argsort(kept)).tolist()) if arr.ndim > 1 else arr

    def __array__(self, dtype=None, copy=None):
        arr = np.transpose(np.asarray(self.base), self.order)
        return arr.astype(dtype) if dtype is not None else arr


def _from_array(data, axes: str, time_axis) -> Stack:
    data, axes, notes = _canonicalise(data, axes, time_axis, None)
    n_ch = data.shape[axes.index("C")] if "C" in axes else 1
    stack = Stack(data=data, axes=axes, pixel_size_um=(math.nan, math.nan, math.nan),
                  interval_h=math.nan, channel_names=[f"ch{i}" for i in range(n_ch)],
                  warnings=notes, source_format="array")
    return stack


def _length_um(value, unit: str | None) -> float | None:
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    if unit is None:
        return v
    factor = _UNIT_UM.get(str(unit).strip().lower().replace("\\u00b5", "µ"))
    if factor is None:
        factor = _UNIT_UM.get(str(unit).strip().lower())
    return None if factor is None else v * factor


def _open_lazy(tif, series, path: Path):
    """The series as a memory map when contiguous and uncompressed, else as a zarr array. The
    map has the file's byte order (ImageJ, for one, writes big-endian files)."""
    try:
        if series.dataoffset is not None:
            mm = np.memmap(path, dtype=series.dtype.newbyteorder(tif.byteorder), mode="r", offset=series.dataoffset,
                           shape=series.shape, order="C")
            return mm, None
    except (ValueError, OSError):
        pass
    import zarr

    store = series.aszarr()
    arr = zarr.open(store, mode="r")
    return arr, store.close


class _TifffileLog:
    """Catch what tifffile logs while a file is opened (instead of letting it reach stderr) and
    tell a truncated or damaged file from harmless notes."""

    def __enter__(self):
        import logging

        self.records: list[str] = []
        self._logger = logging.getLogger("tifffile")
        self._handler = logging.Handler(logging.WARNING)
        self._handler.emit = lambda rec: self.records.append(rec.getMessage())
        self._propagate = self._logger.propagate
        self._logger.addHandler(self._handler)
        self._logger.propagate = False
        return self

    def __exit__(self, *exc):
        self._logger.removeHandler(self._handler)
        self._logger.propagate = self._propagate
        return False

    def raise_if_damaged(self, path: Path) -> None:
        """InputError when a logged problem shows missing bytes or corrupt structure."""
        size = path.stat().st_size
        for msg in self.records:
            offsets = [int(v) for v in re.findall(r"offset (\d+)", msg)]
            # tag 270 (image description) holds the ImageJ/OME axes and scale: without it the
            # file would be read with the wrong axes
            if any(o >= size for o in offsets) or "corrupted" in msg.lower() or "TiffTag 270 " in msg:
                what = msg.split("> ")[-1].rstrip("')\"")
                raise InputError(f"file is truncated or damaged ({size} bytes; {what})", path,
                                 "copy the file again from the microscope or archive")


def _read_tiff(path: Path, time_axis: str | None) -> Stack:
    import tifffile

    if path.stat().st_size == 0:
        raise InputError("file is empty (0 bytes)", path, "copy the file again from the microscope or archive")
    with _TifffileLog() as log:
        try:
            tif = tifffile.TiffFile(path)
        except (tifffile.TiffFileError, ValueError, struct_error(), OSError) as exc:
            raise InputError(f"not a readable TIFF file ({_first_line(exc)})", path,
                             "give an ImageJ hyperstack, OME-TIFF or multi-page TIFF") from None
        try:
            series = tif.series[0] if tif.series else None
            _ = tif.is_ome and tif.ome_metadata, tif.is_imagej and tif.imagej_metadata
        except Exception:
            series = None
    try:
        log.raise_if_damaged(path)
        if series is None:
            raise InputError("TIFF file holds no image", path)
        axes = series.axes
        pixel = [None, None, None]
        interval = None
        names: list[str] | None = None
        fmt = "tiff"
        if tif.is_ome and tif.ome_metadata:
            fmt = "ome-tiff"
            pixel, interval, names = _ome_meta(tif, path)
        elif tif.is_imagej:
            fmt = "imagej"
            pixel, interval, names = _imagej_meta(tif)
        else:
            pixel, interval = _plain_meta(tif)
        # check the data is really there (truncated files)
        end = series.dataoffset + series.nbytes if series.dataoffset is not None else None
        if end is not None and end > path.stat().st_size:
            raise InputError(f"file is truncated ({path.stat().st_size} of {end} bytes)", path,
                             "copy the file again")
        data, closer = _open_lazy(tif, series, path)
        if closer is None:
            # a memmap needs no open TiffFile
            tif.close()
            tif_close = None
        else:
            def tif_close(c=closer, t=tif):
                c()
                t.close()
        data, axes, notes = _canonicalise(data, axes, time_axis, path)
    except InputError:
        tif.close()
        raise
    except (ValueError, OSError, KeyError, IndexError, struct_error()) as exc:
        tif.close()
        raise InputError(f"cannot read the TIFF image data ({_first_line(exc)})", path,
                         "the file may be truncated or corrupt") from None
    n_ch = data.shape[axes.index("C")] if "C" in axes else 1
    if not names or len(names) != n_ch:
        names = [f"ch{i}" for i in range(n_ch)]
    stack = Stack(data=data, axes=axes, pixel_size_um=tuple(np.nan if v is None else v for v in pixel),
                  interval_h=np.nan if interval is None else interval, channel_names=list(names),
                  path=path, warnings=notes, source_format=fmt, _close=tif_close)
    return stack


def _read_mapped(mm: np.memmap, part: np.ndarray) -> np.ndarray | None:
    """The values of ``part``, a C-contiguous view into the read-only memory map ``mm``, read
    from the file by positional reads into a new array; None where that cannot be done (then
    the caller copies out of the map). Reading a frame from the file costs about half of
    copying it out of the map, whose pages must be faulted in and released again."""
    import mmap

    m, name = getattr(mm, "_mmap", None), getattr(mm, "filename", None)
    if m is None or name is None or mm.mode != "r" or not hasattr(os, "preadv") or not part.flags.c_contiguous:
        return None
    try:
        out = np.empty(part.shape, part.dtype)
        if out.nbytes == 0:
            return out
        # the map starts at the file offset rounded down to the allocation granularity
        base = np.frombuffer(m, np.uint8).__array_interface__["data"][0]
        start = mm.offset - mm.offset % mmap.ALLOCATIONGRANULARITY + (part.__array_interface__["data"][0] - base)
        buf = memoryview(out).cast("B")
        fd = os.open(name, os.O_RDONLY)
        try:
            done = 0
            while done < len(buf):
                n = os.preadv(fd, [buf[done:]], start + done)
                if n <= 0:
                    return None
                done += n
        finally:
            os.close(fd)
        return out
    except (OSError, ValueError, TypeError):
        return None


def _drop_mapped_pages(mm: np.memmap, part: np.ndarray | None = None) -> None:
    """Release this process' pages of a read-only memory map (they stay in the page cache), so
    that resident memory does not grow with the number of frames read: the pages spanned by
    ``part`` (a view into ``mm``), or all of them."""
    import mmap

    m = getattr(mm, "_mmap", None)
    if m is None or mm.mode not in ("r", "c") or not hasattr(mmap, "MADV_DONTNEED"):
        return
    try:
        if part is None or part.size == 0:
            m.madvise(mmap.MADV_DONTNEED)
            return
        base = np.frombuffer(m, np.uint8).__array_interface__["data"][0]
        from numpy.lib.array_utils import byte_bounds

        lo, hi = byte_bounds(part)
        page = mmap.PAGESIZE
        start = ((lo - base) // page) * page
        stop = min(-(-(hi - base) // page) * page, len(m))
        if 0 <= start < stop:
            m.madvise(mmap.MADV_DONTNEED, start, stop - start)
    except (OSError, ValueError, TypeError):
        pass


def struct_error():
    import struct

    return struct.error


def _first_line(exc) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def _imagej_meta(tif):
    meta = tif.imagej_metadata or {}
    unit = meta.get("unit", "um")
    if isinstance(unit, str) and unit.lower() in ("pixel", "pixels", ""):
        unit = None
    pixel = [None, None, None]
    page = tif.pages[0]
    try:
        rx, ry = page.resolution
        if rx and ry and unit is not None:
            pixel[0] = _length_um(1.0 / rx, unit)
            pixel[1] = _length_um(1.0 / ry, unit)
    except (ZeroDivisionError, TypeError, ValueError):
        pass
    if "spacing" in meta and unit is not None:
        pixel[2] = _length_um(meta["spacing"], unit)
    interval = None
    fi = meta.get("finterval")
    if fi:
        tunit = str(meta.get("tunit", "sec")).lower()
        interval = float(fi) * _UNIT_H.get(tunit, 1 / 3600)
    names = meta.get("Labels")
    if isinstance(names, (list, tuple)) and names:
        n_ch = int(meta.get("channels", 1))
        names = [str(n) for n in names[:n_ch]] if len(set(names[:n_ch])) == n_ch else None
    else:
        names = None
    return pixel, interval, names


def _ome_meta(tif, path):
    import tifffile

    try:
        ome = tifffile.xml2dict(tif.ome_metadata)["OME"]
    except Exception as exc:  # broken XML
        raise MetadataError(f"OME metadata cannot be parsed ({_first_line(exc)})", path) from None
    image = ome.get("Image", {})
    if isinstance(image, list):
        image = image[0]
    pix = image.get("Pixels", {})
    pixel = [None, None, None]
    for i, ax in enumerate("XYZ"):
        if f"PhysicalSize{ax}" in pix:
            pixel[i] = _length_um(pix[f"PhysicalSize{ax}"], pix.get(f"PhysicalSize{ax}Unit", "µm"))
    interval = None
    if "TimeIncrement" in pix:
        unit = str(pix.get("TimeIncrementUnit", "s")).lower()
        if unit in _UNIT_H:
            interval = float(pix["TimeIncrement"]) * _UNIT_H[unit]
    chans = pix.get("Channel", [])
    if isinstance(chans, dict):
        chans = [chans]
    names = [str(c.get("Name", f"ch{i}")) for i, c in enumerate(chans)] if chans else None
    return pixel, interval, names


def _plain_meta(tif):
    page = tif.pages[0]
    pixel = [None, None, None]
    try:
        unit = int(page.resolutionunit)
        rx, ry = page.resolution
        scale = {2: 25400.0, 3: 10000.0}.get(unit)  # inch, centimetre
        if scale and rx and ry and rx != 1 and ry != 1:
            pixel[0], pixel[1] = scale / rx, scale / ry
    except (TypeError, ValueError, ZeroDivisionError):
        pass
    return pixel, None


def _natural_key(p: Path):
    nums = re.findall(r"\d+", p.stem)
    return (int(nums[-1]) if nums else -1, [int(t) if t.isdigit() else t.lower() for t in re.split(r"(\d+)", p.name)])


def _read_folder(path: Path, time_axis: str | None) -> Stack:
    files = sorted([p for p in path.iterdir() if p.is_file() and p.name.lower().endswith(TIFF_SUFFIXES)
                    and not p.name.startswith(".")], key=_natural_key)
    if not files:
        raise InputError("folder holds no TIFF files", path, "give a folder of one TIFF per timepoint")
    import tifffile

    try:
        with _TifffileLog() as log, tifffile.TiffFile(files[0]) as tif:
            series = tif.series[0]
            axes0, shape0, dtype0 = series.axes.upper(), tuple(series.shape), series.dtype
            if tif.is_ome and tif.ome_metadata:
                pixel, interval, names = _ome_meta(tif, files[0])
            elif tif.is_imagej:
                pixel, interval, names = _imagej_meta(tif)
            else:
                (pixel, interval), names = _plain_meta(tif), None
    except (tifffile.TiffFileError, ValueError, OSError, IndexError, struct_error()) as exc:
        raise InputError(f"not a readable TIFF file ({_first_line(exc)})", files[0]) from None
    log.raise_if_damaged(files[0])
    # one file per timepoint: unknown leading axis of a plain file is z
    axes0 = axes0.replace("S", "C")
    unknown = [a for a in axes0 if a not in "ZCYX"]
    if "T" in axes0:
        if shape0[axes0.index("T")] != 1:
            raise InputError(f"{files[0].name} already holds {shape0[axes0.index('T')]} timepoints", path,
                             "give a folder of one file per timepoint, or a single file")
        unknown = [a for a in unknown if a != "T"]
    if len(unknown) == 1 and "Z" not in axes0:
        axes0 = axes0.replace(unknown[0], "Z")
    elif unknown and any(shape0[axes0.index(a)] != 1 for a in unknown):
        raise InputError(f"ambiguous axes {axes0} in {files[0].name}", path,
                         "save each timepoint as an ImageJ or OME TIFF with named axes")

    def read_one(t: int, files=files, shape0=shape0):
        f = files[t]
        try:
            arr = tifffile.imread(f)
        except (tifffile.TiffFileError, ValueError, OSError, struct_error()) as exc:
            raise InputError(f"not a readable TIFF file ({_first_line(exc)})", f) from None
        if arr.shape != shape0:
            raise InputError(f"shape {arr.shape} differs from the first file's {shape0}", f,
                             "every timepoint must have the same size")
        return arr

    lazy = _FolderArray(read_one, len(files), shape0, dtype0)
    data, axes, notes = _canonicalise(lazy, "T" + axes0, None, path)
    data = lazy if data is lazy else data
    n_ch = data.shape[axes.index("C")] if "C" in axes else 1

    def timepoint(t, data=data, axes=axes):
        if isinstance(data, _FolderArray):
            return data.read(t)
        return data[t]

    if not names or len(names) != n_ch:
        names = [f"ch{i}" for i in range(n_ch)]
    return Stack(data=data, axes=axes, pixel_size_um=tuple(np.nan if v is None else v for v in pixel),
                 interval_h=np.nan if interval is None else interval, channel_names=list(names),
                 path=path, warnings=notes + [f"{len(files)} files taken as timepoints in numeric order "
                                                 f"({files[0].name} … {files[-1].name})"],
                 source_format="folder", _timepoint=timepoint)


class _FolderArray:
    """Array-like over a list of files, one per timepoint; reads a file only when indexed."""

    def __init__(self, reader, n, shape, dtype):
        self.read, self.shape, self.dtype = reader, (n,) + tuple(shape), np.dtype(dtype)
        self.ndim = len(self.shape)

    def __getitem__(self, index):
        if not isinstance(index, tuple):
            index = (index,)
        t, rest = index[0], index[1:]
        if isinstance(t, (int, np.integer)):
            return np.asarray(self.read(int(t)))[rest] if rest else np.asarray(self.read(int(t)))
        ts = range(self.shape[0])[t]
        return np.stack([np.asarray(self.read(i))[rest] if rest else self.read(i) for i in ts])

    def __array__(self, dtype=None, copy=None):
        arr = self[:]
        return arr.astype(dtype) if dtype is not None else arr


def _read_zarr(path: Path, axes: str | None, time_axis: str | None) -> Stack:
    import zarr

    try:
        node = zarr.open(str(path), mode="r")
    except Exception as exc:
        raise InputError(f"not a readable zarr store ({_first_line(exc)})", path) from None
    pixel, interval, names = [None, None, None], None, None
    arr = node
    file_axes = None
    if not hasattr(node, "shape"):  # a group: OME-Zarr multiscales
        attrs = dict(node.attrs)
        ms = attrs.get("multiscales") or attrs.get("ome", {}).get("multiscales")
        if not ms:
            raise InputError("zarr group has no OME-Zarr 'multiscales' metadata", path,
                             "give the path of the array itself")
        ms = ms[0]
        ds = ms["datasets"][0]
        arr = node[ds["path"]]
        file_axes = "".join(a["name"][0].upper() if isinstance(a, dict) else str(a)[0].upper() for a in ms.get("axes", []))
        units = [a.get("unit") if isinstance(a, dict) else None for a in ms.get("axes", [])]
        scale = None
        for tr in ds.get("coordinateTransformations", []):
            if tr.get("type") == "scale":
                scale = tr["scale"]
        if scale is not None and file_axes:
            for i, a in enumerate(file_axes):
                if a in "XYZ":
                    pixel["XYZ".index(a)] = _length_um(scale[i], units[i] or "um")
                elif a == "T":
                    tu = str(units[i] or "hour").lower()
                    factor = _UNIT_H.get(tu, _UNIT_H.get(tu.rstrip("s"), _UNIT_H_LONG.get(tu.rstrip("s"))))
                    interval = None if factor is None else float(scale[i]) * factor  # unknown unit: not guessed
        omero = attrs.get("omero") or attrs.get("ome", {}).get("omero") or {}
        if omero.get("channels"):
            names = [str(c.get("label", f"ch{i}")) for i, c in enumerate(omero["channels"])]
    else:
        file_axes = axes or dict(node.attrs).get("axes") or dict(node.attrs).get("_ARRAY_DIMENSIONS") \
            or getattr(getattr(node, "metadata", None), "dimension_names", None)
        if isinstance(file_axes, (list, tuple)):
            if any(a is None for a in file_axes):
                file_axes = None
        if isinstance(file_axes, (list, tuple)):
            file_axes = "".join(str(a)[0] for a in file_axes)
    if not file_axes:
        raise MetadataError(f"zarr array {tuple(arr.shape)} does not say its axes", path,
                            "store an 'axes' attribute (e.g. 'TZYX') or pass axes")
    data, axes_c, notes = _canonicalise(arr, file_axes.upper(), time_axis, path)
    n_ch = data.shape[axes_c.index("C")] if "C" in axes_c else 1
    if not names or len(names) != n_ch:
        names = [f"ch{i}" for i in range(n_ch)]
    return Stack(data=data, axes=axes_c, pixel_size_um=tuple(np.nan if v is None else v for v in pixel),
                 interval_h=np.nan if interval is None else interval, channel_names=names, path=path,
                 warnings=notes, source_format="zarr")


def _apply_overrides(stack: Stack, pixel_size_um, z_step_um, interval_h, channel_names, quiet=False):
    px, py, pz = stack.pixel_size_um

    def check_positive(value, what):
        if value is not None and (not math.isfinite(float(value)) or float(value) <= 0):
            raise MetadataError(f"{what} must be a positive number, not {value}", stack.path)

    check_positive(pixel_size_um, "pixel size")
    check_positive(z_step_um, "z step")
    check_positive(interval_h, "frame interval")

    def differs(a, b):
        return a is not None and b is not None and math.isfinite(a) and not math.isclose(a, b, rel_tol=1e-3)

    for name, val in (("x pixel size", px), ("y pixel size", py), ("z step", pz), ("frame interval", stack.interval_h)):
        if val is not None and math.isfinite(val) and val <= 0:
            if (name.endswith("pixel size") and pixel_size_um is None) or (name == "z step" and z_step_um is None) \
                    or (name == "frame interval" and interval_h is None):
                option = {"z step": "--z-step", "frame interval": "--interval"}.get(name, "--pixel-size")
                raise MetadataError(f"the file's {name} is {val:g}", stack.path,
                                    f"give the right value with {option}")
    if pixel_size_um is not None:
        if differs(px, float(pixel_size_um)):
            stack.warnings.append(f"pixel size {pixel_size_um:g} µm given by the user overrides the file's {px:g} µm")
        px = py = float(pixel_size_um)
    if z_step_um is not None:
        if differs(pz, float(z_step_um)):
            stack.warnings.append(f"z step {z_step_um:g} µm given by the user overrides the file's {pz:g} µm")
        pz = float(z_step_um)
    if interval_h is not None:
        if differs(stack.interval_h, float(interval_h)):
            stack.warnings.append(f"frame interval {interval_h:g} h given by the user overrides the file's "
                                  f"{stack.interval_h:g} h")
        stack.interval_h = float(interval_h)
    if px is None or not math.isfinite(px):
        px = py if (py is not None and math.isfinite(py)) else 1.0
        if not quiet:
            stack.warnings.append("pixel size not in the file: 1 µm assumed (give --pixel-size)")
    if py is None or not math.isfinite(py):
        py = px
    if stack.has_z and (pz is None or not math.isfinite(pz)):
        pz = px
        if not quiet:
            stack.warnings.append(f"z step not in the file: {pz:g} µm (the pixel size) assumed")
    if not stack.has_z:
        pz = math.nan
    if not math.isfinite(stack.interval_h):
        stack.interval_h = 1.0
        if not quiet:
            stack.warnings.append("frame interval not in the file: 1 h assumed (give --interval)")
    stack.pixel_size_um = (float(px), float(py), float(pz))
    if channel_names is not None:
        if len(channel_names) != stack.n_channels:
            raise MetadataError(f"{len(channel_names)} channel names given for {stack.n_channels} channel(s)", stack.path)
        stack.channel_names = [str(n) for n in channel_names]


def _check(stack: Stack) -> None:
    if stack.n_frames < 2:
        raise InputError(f"the stack has a single timepoint ({stack.axes} {stack.shape}); a time-lapse is needed",
                         stack.path, "give a stack with at least 2 timepoints (or say which axis is time with --time-axis)")
    ny, nx = stack.shape_yx
    if ny < 8 or nx < 8:
        raise InputError(f"images of {ny}×{nx} pixels are too small", stack.path,
                         "give images of at least 8×8 pixels (check that Y and X are the image axes)")
    if np.dtype(stack.data.dtype).kind not in "uif b":
        raise InputError(f"unsupported pixel type {stack.data.dtype}", stack.path)
