"""Raw TIFF input: discovery, header checks and reading one volume.

Three layouts are understood:

``"per-volume"``  one multi-page file per volume (pages = acquired planes);
``"per-plane"``   one single-page file per plane, the name carries the volume and plane index;
``"stack"``       one or a few long multi-page files, pages in time-major order (volume 0's
                  planes, then volume 1's ...); a volume may straddle two files.

:func:`discover_inputs` orders the files by the integer parsed from the name (so ``img_10``
follows ``img_9`` and zero padding does not matter), walks every page header once, checks the
sequence and returns a :class:`TiffInputs`: a small, picklable description that
:func:`read_volume` uses to read one volume in z-ascending order. Each reader opens its files
itself, so it can run on process workers and on a cluster.

Plane order: ``plane_slots`` gives, for each output plane (z ascending), its slot in the
acquisition order within the volume; the align stage turns slots into per-plane sample times.
"""

from __future__ import annotations

import contextlib
import logging
import re
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import tifffile

from pipeline.errors import ConfigError, InputError

__all__ = [
    "TiffInputs",
    "discover_inputs",
    "describe_inputs",
    "read_volume",
    "iter_volumes",
    "plane_slots",
    "file_index",
]

_LAYOUTS = ("per-volume", "per-plane", "stack")
_ORDERS = ("ascending", "descending", "alternating")
_DTYPES = ("uint16", "uint8")  # read losslessly into uint16


@dataclass(frozen=True)
class TiffInputs:
    """The checked raw input of a session (headers only; no pixel data).

    Attributes
    ----------
    layout : str
        ``"per-volume"``, ``"per-plane"`` or ``"stack"``.
    files : tuple of str
        The files in sequence order.
    pages : tuple of int
        Page count of each file.
    planes_per_volume : int
        Acquired planes per volume, flyback planes included.
    flyback_planes : tuple of int
        Acquisition slots dropped from every volume.
    plane_order : str
        ``"ascending"``, ``"descending"`` or ``"alternating"``.
    n_volumes : int
        Complete volumes in the input.
    shape_yx : tuple of int
        Page shape (y, x).
    dtype : str
        Page dtype (``uint16`` or ``uint8``).
    bigtiff : bool
        True when any file is a BigTIFF.
    plane_files : tuple of tuple of int
        Per-plane layout only: ``plane_files[t][slot]`` is the index in ``files`` of volume
        t's plane in acquisition slot ``slot``.
    notes : tuple of str
        Repairs made while discovering (for the stage to record as warnings).
    """

    layout: str
    files: tuple[str, ...]
    pages: tuple[int, ...]
    planes_per_volume: int
    flyback_planes: tuple[int, ...]
    plane_order: str
    n_volumes: int
    shape_yx: tuple[int, int]
    dtype: str
    bigtiff: bool = False
    plane_files: tuple[tuple[int, ...], ...] = ()
    notes: tuple[str, ...] = ()

    @property
    def n_planes(self) -> int:
        """Planes kept per volume."""
        return self.planes_per_volume - len(set(self.flyback_planes))

    @property
    def shape(self) -> tuple[int, int, int, int]:
        """Shape (t, z, y, x) of the ingested volumes."""
        return (self.n_volumes, self.n_planes, *self.shape_yx)


# --------------------------------------------------------------------------------------------
def plane_slots(volume: int, *, planes_per_volume: int, flyback_planes: Sequence[int] = (),
                plane_order: str = "ascending") -> np.ndarray:
    """Acquisition slot of each output plane of one volume, output planes z-ascending.

    Parameters
    ----------
    volume : int
        Volume index (only its parity matters, for ``"alternating"``).
    planes_per_volume : int
        Acquired planes per volume, flyback planes included.
    flyback_planes : sequence of int, default=()
        Acquisition slots to drop (within ``range(planes_per_volume)``).
    plane_order : {"ascending", "descending", "alternating"}, default="ascending"
        ``"descending"``: slot 0 is the top plane (largest z); ``"alternating"``: a
        bidirectional scan, even volumes ascending and odd volumes descending.

    Returns
    -------
    ndarray of shape (n_planes,), int64
        ``slots[z]`` is the acquisition slot of output plane z.

    Raises
    ------
    ConfigError
        Unknown order, a flyback slot out of range, or (alternating) a flyback set that is not
        mirror-symmetric, which would keep different depths in odd and even volumes.
    """
    n = int(planes_per_volume)
    drop = sorted(set(int(p) for p in flyback_planes))
    if plane_order not in _ORDERS:
        raise ConfigError(f"imaging.plane_order = {plane_order!r}: expected one of {_ORDERS}")
    if any(p < 0 or p >= n for p in drop):
        raise ConfigError(f"imaging.flyback_planes = {drop}: slots must lie in 0..{n - 1}")
    if plane_order == "alternating" and sorted(n - 1 - p for p in drop) != drop:
        raise ConfigError(f"imaging.flyback_planes = {drop}: with plane_order = 'alternating' "
                          f"the dropped slots must be symmetric (slot p and {n - 1} - p)")
    reverse = plane_order == "descending" or (plane_order == "alternating" and volume % 2 == 1)
    slots = np.arange(n)[::-1] if reverse else np.arange(n)  # slots[depth]
    keep = np.array([s for s in slots if s not in drop], dtype=np.int64)
    return keep


def file_index(path: str | Path, regex: str, *, remove: str | None = None) -> int:
    """The integer index parsed from a file name by the first group of ``regex``.

    Parameters
    ----------
    path : str or Path
        The file; only its name is searched.
    regex : str
        Pattern whose first group is the index (``(\\d+)(?!.*\\d)`` = the last number).
    remove : str, optional
        A pattern cut out of the name first (the per-plane layout removes the plane token
        before looking for the volume index).

    Raises
    ------
    InputError
        The pattern does not match the name.
    """
    name = Path(path).name
    if remove:
        name = re.sub(remove, "", name, count=1)
    m = re.search(regex, name)
    if m is None or not m.groups() or m.group(1) is None:
        raise InputError(f"{path}: file name does not match imaging index regex {regex!r}"
                         f"{' (after removing ' + repr(remove) + ')' if remove else ''}; "
                         f"expected a number in the name")
    return int(m.group(1))


def _check_sequence(indexed: list[tuple[int, str]], what: str) -> list[str]:
    """Sort by index; raise on duplicated or missing indices."""
    indexed.sort(key=lambda p: p[0])
    for (i0, f0), (i1, f1) in zip(indexed, indexed[1:], strict=False):
        if i1 == i0:
            raise InputError(f"{f1}: duplicated {what} index {i1} (also in {f0}); expected one "
                             f"file per index")
        if i1 != i0 + 1:
            raise InputError(f"{f1}: {what} index jumps from {i0} ({Path(f0).name}) to {i1}; "
                             f"missing {what} indices {i0 + 1}..{i1 - 1}")
    return [f for _, f in indexed]


class _TiffLogCapture(logging.Handler):
    """Collects what tifffile logs while a file is read (it logs, not raises, on a bad IFD)."""

    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage())


@contextlib.contextmanager
def _tifffile_log() -> Iterator[_TiffLogCapture]:
    """Capture tifffile's warnings (instead of letting them reach stderr) for one file.

    tifffile stops walking the page chain at an invalid IFD offset (a truncated file) and only
    logs it; the caller turns a captured message into an :class:`InputError` naming the page.
    """
    logger = tifffile.logger()
    handler = _TiffLogCapture()
    old_propagate = logger.propagate
    logger.addHandler(handler)
    logger.propagate = False
    try:
        yield handler
    finally:
        logger.removeHandler(handler)
        logger.propagate = old_propagate


def _header(path: str) -> tuple[int, tuple[int, int], str, bool]:
    """Page count, page shape, dtype and BigTIFF flag of one file, checking every page."""
    p = Path(path)
    try:
        size = p.stat().st_size
    except OSError as exc:
        raise InputError(f"{path}: cannot read the file ({exc.strerror})") from None
    if size == 0:
        raise InputError(f"{path}: the file is empty (0 bytes); expected a TIFF")
    shape: tuple[int, ...] | None = None
    dtype = ""
    bigtiff = False
    n = 0
    try:
        with _tifffile_log() as logged, tifffile.TiffFile(path) as tif:
            bigtiff = bool(tif.is_bigtiff)
            for i, page in enumerate(tif.pages):
                pshape, pdtype = tuple(page.shape), str(page.dtype)  # type: ignore[union-attr]
                if shape is None:
                    shape, dtype = pshape, pdtype
                elif pshape != shape or pdtype != dtype:
                    raise InputError(f"{path}: page {i} has shape {pshape} {pdtype}; expected "
                                     f"{shape} {dtype} like page 0")
                offsets = page.dataoffsets  # type: ignore[union-attr]
                counts = page.databytecounts  # type: ignore[union-attr]
                end = max((o + c for o, c in zip(offsets, counts, strict=False)), default=0)
                if end > size or not offsets:
                    raise InputError(f"{path}: page {i} is truncated (its data ends at byte "
                                     f"{end}, the file has {size} bytes)")
                n = i + 1
            if logged.messages:
                at = f"after page {n - 1}" if n else "at page 0"
                raise InputError(f"{path}: the file is truncated or damaged {at} ({n} readable "
                                 f"page(s), file size {size} bytes; tifffile: "
                                 f"{logged.messages[0]})")
    except InputError:
        raise
    except Exception as exc:  # tifffile raises several kinds on a damaged file
        where = (f"the header of page {n} (after page {n - 1}) cannot be parsed" if n
                 else "not a readable TIFF")
        raise InputError(f"{path}: {where} ({type(exc).__name__}: {exc})") from None
    if shape is None or n == 0:
        raise InputError(f"{path}: the TIFF has no pages")
    if len(shape) != 2:
        raise InputError(f"{path}: page 0 has shape {shape}; expected a 2-D (y, x) plane")
    return n, (int(shape[0]), int(shape[1])), dtype, bigtiff


def discover_inputs(
    files: Sequence[str | Path],
    *,
    layout: str = "per-volume",
    planes_per_volume: int,
    flyback_planes: Sequence[int] = (),
    plane_order: str = "ascending",
    index_regex: str = r"(\d+)(?!.*\d)",
    plane_regex: str = r"[Pp]lane_?(\d+)",
    drop_partial_volume: bool = False,
) -> TiffInputs:
    """Order, check and describe the raw TIFF files of a session from their headers.

    Parameters
    ----------
    files : sequence of str or Path
        The raw files (any order).
    layout : {"per-volume", "per-plane", "stack"}, default="per-volume"
        How volumes are spread over files (see the module docstring).
    planes_per_volume : int
        Acquired planes per volume, flyback planes included.
    flyback_planes : sequence of int, default=()
        Acquisition slots to drop.
    plane_order : {"ascending", "descending", "alternating"}, default="ascending"
        Acquisition order of the planes (see :func:`plane_slots`).
    index_regex : str, default=r"(\\d+)(?!.*\\d)"
        First group = the file's sequence index (volume index for per-volume and per-plane).
        A single stack file needs no index.
    plane_regex : str, default=r"[Pp]lane_?(\\d+)"
        Per-plane layout: first group = the plane slot; the matched token is removed from the
        name before ``index_regex`` looks for the volume index.
    drop_partial_volume : bool, default=False
        Stack layout: when the total page count is not a multiple of ``planes_per_volume``,
        drop the incomplete last volume (recorded in ``notes``) instead of failing.

    Returns
    -------
    TiffInputs

    Raises
    ------
    InputError
        No files; a name without an index; a duplicated or missing index; an empty,
        unreadable or truncated file (named with its page); a page of another shape or dtype;
        a page count that does not fit the planes per volume.
    ConfigError
        Unknown layout or plane order, or bad flyback slots.
    """
    if layout not in _LAYOUTS:
        raise ConfigError(f"imaging.layout = {layout!r}: expected one of {_LAYOUTS}")
    plane_slots(0, planes_per_volume=planes_per_volume, flyback_planes=flyback_planes,
                plane_order=plane_order)  # validates the plane settings
    names = [str(f) for f in files]
    if not names:
        raise InputError("no raw TIFF files: imaging.raw matched nothing")
    P = int(planes_per_volume)
    notes: list[str] = []
    plane_files: tuple[tuple[int, ...], ...] = ()
    if layout == "per-plane":
        grid: dict[int, dict[int, str]] = {}
        for f in names:
            slot = file_index(f, plane_regex)
            vol = file_index(f, index_regex, remove=plane_regex)
            if slot in grid.setdefault(vol, {}):
                raise InputError(f"{f}: duplicated volume {vol} plane {slot} (also in "
                                 f"{grid[vol][slot]}); expected one file per plane")
            grid[vol][slot] = f
        base = min(min(planes) for planes in grid.values())  # plane numbering from 0 or 1
        _check_sequence([(v, next(iter(grid[v].values()))) for v in grid], "volume")
        names = []
        rows = []
        for v in sorted(grid):
            row = []
            for slot in range(P):
                hit = grid[v].get(base + slot)
                if hit is None:
                    raise InputError(f"volume {v}: plane {base + slot} is missing (files of this "
                                     f"volume: {', '.join(Path(x).name for x in grid[v].values())});"
                                     f" expected planes {base}..{base + P - 1}")
                row.append(len(names))
                names.append(hit)
            extra = sorted(set(grid[v]) - set(range(base, base + P)))
            if extra:
                raise InputError(f"{grid[v][extra[0]]}: plane {extra[0]} is beyond "
                                 f"imaging.planes_per_volume = {P} (planes {base}..{base + P - 1})")
            rows.append(tuple(row))
        plane_files = tuple(rows)
    elif len(names) > 1 or layout == "per-volume":
        names = _check_sequence([(file_index(f, index_regex), f) for f in names], "file")

    pages: list[int] = []
    shape_yx: tuple[int, int] | None = None
    dtype = ""
    bigtiff = False
    for f in names:
        n, shp, dt, big = _header(f)
        bigtiff |= big
        if shape_yx is None:
            shape_yx, dtype = shp, dt
            if dt not in _DTYPES:
                raise InputError(f"{f}: page 0 has dtype {dt}; expected one of {_DTYPES}")
        elif shp != shape_yx or dt != dtype:
            raise InputError(f"{f}: page 0 has shape {shp} {dt}; expected {shape_yx} {dtype} "
                             f"like {names[0]}")
        if layout == "per-volume" and n != P:
            raise InputError(f"{f}: {n} pages; expected imaging.planes_per_volume = {P} pages "
                             f"per file (layout 'per-volume')")
        if layout == "per-plane" and n != 1:
            raise InputError(f"{f}: {n} pages; expected one page per file (layout 'per-plane')")
        pages.append(n)
    assert shape_yx is not None
    if layout == "per-volume":
        n_volumes = len(names)
    elif layout == "per-plane":
        n_volumes = len(plane_files)
    else:
        total = sum(pages)
        n_volumes, rest = divmod(total, P)
        if rest:
            if not drop_partial_volume or n_volumes == 0:
                raise InputError(f"{names[-1]}: the stack holds {total} pages in all, not a "
                                 f"multiple of imaging.planes_per_volume = {P} ({rest} pages "
                                 f"left over after {n_volumes} volumes)")
            notes.append(f"{names[-1]}: dropped the incomplete last volume ({rest} of {P} "
                         f"planes; pages {total - rest}..{total - 1} of the stack)")
    return TiffInputs(layout=layout, files=tuple(names), pages=tuple(pages),
                      planes_per_volume=P, flyback_planes=tuple(sorted(set(flyback_planes))),
                      plane_order=plane_order, n_volumes=n_volumes, shape_yx=shape_yx,
                      dtype=dtype, bigtiff=bigtiff, plane_files=plane_files, notes=tuple(notes))


def describe_inputs(files: Sequence[str | Path], **options: Any) -> dict[str, Any]:
    """Check the whole input sequence from TIFF headers only and summarise it.

    For ``forkmap check``: no pixel data is read. ``options`` are those of
    :func:`discover_inputs`.

    Returns
    -------
    dict
        ``layout, n_files, n_volumes, shape (t, z, y, x), dtype, bigtiff, bytes, first_file,
        last_file, notes``.

    Raises
    ------
    InputError, ConfigError
        As :func:`discover_inputs`.
    """
    inp = discover_inputs(files, **options)
    return {
        "layout": inp.layout, "n_files": len(inp.files), "n_volumes": inp.n_volumes,
        "shape": list(inp.shape), "dtype": inp.dtype, "bigtiff": inp.bigtiff,
        "bytes": int(sum(Path(f).stat().st_size for f in inp.files)),
        "first_file": inp.files[0], "last_file": inp.files[-1], "notes": list(inp.notes),
    }


# --------------------------------------------------------------------------------------------
def _locate(inp: TiffInputs, volume: int) -> list[tuple[int, int]]:
    """(file index, page index) of each output plane of one volume, z ascending."""
    if not 0 <= volume < inp.n_volumes:
        raise IndexError(f"volume {volume} out of range 0..{inp.n_volumes - 1}")
    slots = plane_slots(volume, planes_per_volume=inp.planes_per_volume,
                        flyback_planes=inp.flyback_planes, plane_order=inp.plane_order)
    P = inp.planes_per_volume
    if inp.layout == "per-volume":
        return [(volume, int(s)) for s in slots]
    if inp.layout == "per-plane":
        return [(inp.plane_files[volume][int(s)], 0) for s in slots]
    starts = np.concatenate([[0], np.cumsum(inp.pages)])
    out = []
    for s in slots:
        g = volume * P + int(s)
        f = int(np.searchsorted(starts, g, side="right") - 1)
        out.append((f, int(g - starts[f])))
    return out


def iter_volumes(inp: TiffInputs, volumes: Sequence[int]) -> Iterator[np.ndarray]:
    """Read several volumes, keeping each file open while consecutive volumes need it.

    Yields
    ------
    ndarray of shape (z, y, x), uint16
        One volume per requested index, planes z-ascending.

    Raises
    ------
    InputError
        A page cannot be decoded (the message names the file and page).
    """
    handles: dict[int, tifffile.TiffFile] = {}
    try:
        for v in volumes:
            where = _locate(inp, int(v))
            needed = {f for f, _ in where}
            for f in list(handles):
                if f not in needed:
                    handles.pop(f).close()
            out = np.empty((len(where), *inp.shape_yx), dtype=np.uint16)
            for z, (f, page) in enumerate(where):
                path = inp.files[f]
                try:
                    if f not in handles:
                        handles[f] = tifffile.TiffFile(path)
                    plane = handles[f].pages[page].asarray()  # type: ignore[union-attr]
                except Exception as exc:
                    raise InputError(f"{path}: page {page} cannot be read "
                                     f"({type(exc).__name__}: {exc})") from None
                if plane.shape != inp.shape_yx:
                    raise InputError(f"{path}: page {page} has shape {plane.shape}; expected "
                                     f"{inp.shape_yx}")
                out[z] = plane
            yield out
    finally:
        for h in handles.values():
            h.close()


def read_volume(inp: TiffInputs, volume: int) -> np.ndarray:
    """Read one volume (z, y, x) as uint16, planes z-ascending and flyback planes dropped.

    Parameters
    ----------
    inp : TiffInputs
        From :func:`discover_inputs`.
    volume : int
        Volume index in ``range(inp.n_volumes)``.

    Raises
    ------
    InputError
        A page cannot be decoded (the message names the file and page).
    """
    return next(iter_volumes(inp, [volume]))
