"""One variable of a NetCDF cube read as a series: CF time, packing and grid decoding.

:func:`open_cube` gives a :class:`~covextract.io.series.SeriesIndex` whose
period sources are :class:`CubeSource` objects: one time step each, with the
engine's raster-source protocol, sharing one file handle per process.
"""

from __future__ import annotations

import datetime as dt
import math
import threading
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from covextract.core.grid import Grid
from covextract.core.periods import Period, Step, check_starts, parse_every
from covextract.errors import InputFileError, RasterError
from covextract.io.rasters import RasterSource, _check_path
from covextract.io.series import SeriesIndex

__all__ = ["CubeSource", "open_cube"]

#: Calendars whose dates are the Gregorian calendar dates study records use.
_GREGORIAN = {"standard", "gregorian", "proleptic_gregorian"}

_DAY = dt.timedelta(days=1)


# ------------------------------------------------------------------- the cube
class _CubeFile:
    """One variable of a NetCDF file, shared by the period sources of a cube.

    Rows and columns of the covextract grid map to the file's through
    ``row_index`` and ``col_index`` (flipped latitudes, rolled longitudes).
    The xarray dataset is opened once per process on first read and never
    pickled; reads go through xarray's lazy indexing, which holds its
    netCDF/HDF5 lock.
    """

    def __init__(self, path, engine, variable, dims, fixed, row_index, col_index):
        self.path = Path(path)
        self.engine = engine
        self.variable = variable
        self.time_dim, self.y_dim, self.x_dim = dims
        self.fixed = dict(fixed)
        self.row_index = np.asarray(row_index, dtype=np.int64)
        self.col_index = np.asarray(col_index, dtype=np.int64)
        self._ds = None
        self._lock = threading.Lock()

    def __getstate__(self):
        state = self.__dict__.copy()
        state["_ds"] = None  # file handles never travel between processes
        state.pop("_lock", None)
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self._lock = threading.Lock()

    def _variable(self):
        with self._lock:
            if self._ds is None:
                import xarray as xr

                self._ds = xr.open_dataset(
                    self.path,
                    engine=self.engine,
                    decode_times=False,
                    mask_and_scale=False,
                    cache=False,
                )
            return self._ds[self.variable]

    def read(self, time_index: int, window: tuple[int, int, int, int]) -> np.ndarray:
        r0, c0, h, w = window
        rows = self.row_index[r0 : r0 + h]
        cols = self.col_index[c0 : c0 + w]
        if rows.size != h or cols.size != w or r0 < 0 or c0 < 0:
            raise ValueError(f"window {window} is outside the cube's grid")
        var = self._variable()
        out = np.empty((h, w), dtype=var.dtype)
        for rsrc, rdst, rrev in _runs(rows):
            for csrc, cdst, crev in _runs(cols):
                sel = {self.time_dim: time_index, self.y_dim: rsrc, self.x_dim: csrc, **self.fixed}
                block = var.isel(sel).transpose(self.y_dim, self.x_dim).values
                out[rdst, cdst] = block[:: -1 if rrev else 1, :: -1 if crev else 1]
        return out

    def close(self) -> None:
        with self._lock:
            if self._ds is not None:
                self._ds.close()
                self._ds = None


def _runs(index: np.ndarray) -> list[tuple[slice, slice, bool]]:
    """Split file indices into contiguous runs: (file slice, output slice, reversed)."""
    out = []
    n = index.size
    start = 0
    while start < n:
        end = start + 1
        step = 1
        if end < n and abs(int(index[end]) - int(index[start])) == 1:
            step = int(index[end]) - int(index[start])
            while end < n and int(index[end]) - int(index[end - 1]) == step:
                end += 1
        lo, hi = int(index[start:end].min()), int(index[start:end].max())
        out.append((slice(lo, hi + 1), slice(start, end), step == -1 and end - start > 1))
        start = end
    return out


@dataclass
class CubeSource:
    """One time step of a NetCDF cube, with the engine's raster-source protocol.

    ``read_block(window)`` returns the stored (packed) numbers of the window
    on :attr:`grid`, north-up, whatever the file's latitude order or
    longitude range; ``to_values`` applies ``_FillValue``/``missing_value``,
    ``scale_factor``/``add_offset`` and the valid range exactly as for a
    GeoTIFF layer.

    netCDF and HDF5 reads hold a global lock (the libraries are not
    thread-safe), so blocks of a cube do not decode in parallel the way
    GeoTIFF blocks do; threads only overlap the reduction.

    Attributes
    ----------
    period : Period
        The period this time step holds.
    time_index : int
        0-based index along the file's time dimension.
    grid : Grid
        North-up lattice; longitudes in -180..180 when the file's 0..360
        grid covers the globe (see :func:`open_cube`).
    """

    cube: _CubeFile
    time_index: int
    period: Period
    grid: Grid
    dtype: str
    nodata: tuple[float, ...] = ()
    scale: float = 1.0
    offset: float = 0.0
    valid_range: tuple[float, float] | None = None
    ceiling: float | None = None

    @property
    def path(self) -> Path:
        """The cube file."""
        return self.cube.path

    @property
    def variable(self) -> str:
        """The variable read."""
        return self.cube.variable

    def read_block(self, window: tuple[int, int, int, int]) -> np.ndarray:
        """Read stored values of ``(row_off, col_off, rows, cols)`` on :attr:`grid`."""
        return self.cube.read(self.time_index, window)

    def to_values(self, stored: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Physical float64 values and the valid mask of a stored block."""
        # The GeoTIFF conversion itself, so a cube and the same numbers as
        # GeoTIFFs agree value for value.
        return RasterSource.to_values(self, stored)

    def close(self) -> None:
        """Close the cube's file handle in this process."""
        self.cube.close()


class _CubeBackend:
    def __init__(self, cube: _CubeFile, steps: dict[Period, int], grid: Grid, conv: dict):
        self._cube = cube
        self._steps = steps
        self._grid = grid
        self._conv = conv

    def periods(self):
        return list(self._steps)

    def path(self, period: Period) -> Path:
        return self._cube.path

    def where(self, period: Period) -> str:
        return (
            f"{self._cube.path} (variable {self._cube.variable}, {self._cube.time_dim} index "
            f"{self._steps[period]})"
        )

    def source(self, period: Period) -> CubeSource:
        return CubeSource(self._cube, self._steps[period], period, self._grid, **self._conv)

    def grid(self, period: Period) -> Grid:
        return self._grid


_ENGINES = ("netcdf4", "h5netcdf", "scipy")


def _open_dataset(path: Path, label: str):
    import xarray as xr

    installed = [e for e in _ENGINES if e in xr.backends.list_engines()]
    if not installed:
        raise InputFileError(
            f"{label} {path} cannot be read: no NetCDF reader is installed for xarray. Install "
            "netCDF4 (pip install netCDF4)."
        )
    errors = []
    for engine in installed:
        try:
            ds = xr.open_dataset(
                path, engine=engine, decode_times=False, mask_and_scale=False, cache=False
            )
        except Exception as exc:  # noqa: BLE001 - each engine fails in its own way
            errors.append(f"{engine}: {(str(exc).splitlines() or [type(exc).__name__])[0]}")
            continue
        return ds, engine
    raise InputFileError(
        f"{label} {path} cannot be opened as a NetCDF cube ({'; '.join(errors)}). Is it a "
        "NetCDF file?"
    )


def _looks(ds, dim: str) -> str | None:
    """'x', 'y' or 't' from a coordinate's CF attributes or name."""
    var = ds.variables.get(dim)
    attrs = var.attrs if var is not None else {}
    axis = str(attrs.get("axis", "")).upper()
    std = str(attrs.get("standard_name", "")).lower()
    units = str(attrs.get("units", "")).lower()
    name = dim.lower()
    if axis == "T" or std == "time" or " since " in units or name in ("time", "t"):
        return "t"
    if (
        axis == "X"
        or std in ("longitude", "projection_x_coordinate", "grid_longitude")
        or units in ("degrees_east", "degree_east", "degree_e", "degrees_e")
        or name in ("x", "lon", "longitude")
    ):
        return "x"
    if (
        axis == "Y"
        or std in ("latitude", "projection_y_coordinate", "grid_latitude")
        or units in ("degrees_north", "degree_north", "degree_n", "degrees_n")
        or name in ("y", "lat", "latitude")
    ):
        return "y"
    return None


def _axis(ds, dim: str, where: str) -> tuple[float, float, int]:
    """First centre, spacing and size of a regular coordinate."""
    var = ds.variables.get(dim)
    if var is None or var.ndim != 1:
        raise RasterError(
            f"{where}: dimension {dim!r} has no coordinate values, so the grid cannot be placed; "
            "the file needs 1-D coordinate variables for its spatial dimensions"
        )
    v = np.asarray(var.values, dtype=np.float64)
    if v.size < 2:
        raise RasterError(
            f"{where}: dimension {dim!r} has {v.size} value(s); a grid needs at least 2"
        )
    step = (v[-1] - v[0]) / (v.size - 1)
    # Coordinates stored as float32 carry rounding noise; 0.1 % of a pixel is
    # far below anything a real irregular grid shows.
    if not np.isfinite(step) or step == 0 or np.max(np.abs(np.diff(v) - step)) > 1e-3 * abs(step):
        raise RasterError(
            f"{where}: coordinate {dim!r} is not evenly spaced (a curvilinear or irregular grid); "
            "covextract needs a regular grid: regrid the cube first"
        )
    return float(v[0]), float(step), int(v.size)


def _cube_crs(ds, var, crs, where: str):
    from pyproj import CRS

    if crs is not None:
        try:
            return CRS.from_user_input(crs)
        except Exception as exc:  # noqa: BLE001 - pyproj raises its own error class
            raise RasterError(f"{where}: crs {crs!r} is not a CRS pyproj knows ({exc})") from None
    gm = var.attrs.get("grid_mapping") or var.encoding.get("grid_mapping")
    if gm:
        # CF also allows "name: coord coord ..." lists; the first mapping is used.
        name = str(gm).split(":")[0].split()[0]
        gvar = ds.variables.get(name)
        if gvar is None:
            raise RasterError(
                f"{where}: grid_mapping {gm!r} names a variable the file does not have; set crs: "
                "in the recipe"
            )
        try:
            return CRS.from_cf(dict(gvar.attrs))
        except Exception as exc:  # noqa: BLE001
            raise RasterError(
                f"{where}: grid mapping {name!r} cannot be read as a CRS ({exc}); set crs: in "
                "the recipe"
            ) from None
    looks_lonlat = any(
        _looks(ds, d) in ("x", "y") and d.lower().startswith(("lat", "lon")) for d in var.dims
    )
    example = (
        'crs: "EPSG:4326" if the coordinates are WGS84 degrees' if looks_lonlat else 'crs: "EPSG:…"'
    )
    raise RasterError(
        f"{where} has no CRS: the variable has no grid_mapping attribute. Add {example} to the "
        "layer in the recipe (crs= in open_cube), or add a CF grid mapping to the file."
    )


def _cf_dates(values, units, calendar, where: str):
    import cftime

    if not units or " since " not in str(units):
        raise RasterError(
            f"{where}: time values have no CF units such as 'days since 2000-01-01' (units: "
            f"{units!r}), so their dates are unknown"
        )
    try:
        return np.asarray(
            cftime.num2date(
                np.asarray(values),
                str(units),
                calendar=str(calendar),
                only_use_cftime_datetimes=True,
            ),
            dtype=object,
        )
    except Exception as exc:  # noqa: BLE001 - cftime raises ValueError or its own errors
        raise RasterError(
            f"{where}: time values cannot be read as dates (units {units!r}, calendar "
            f"{calendar!r}: {exc})"
        ) from None


def _midnight(c) -> bool:
    return c.hour == 0 and c.minute == 0 and c.second == 0 and c.microsecond == 0


def _exclusive_end(c):
    """Upper time bound as an exclusive midnight (inclusive bounds such as 23:59:59 round up)."""
    if _midnight(c):
        return c
    return c.replace(hour=0, minute=0, second=0, microsecond=0) + _DAY


def _calendar_date(c, where: str, calendar: str) -> dt.date:
    try:
        return dt.date(c.year, c.month, c.day)
    except ValueError:
        raise RasterError(
            f"{where}: {c.year:04d}-{c.month:02d}-{c.day:02d} of the {calendar} calendar is no "
            "calendar date; daily steps of this calendar cannot be matched to study dates"
        ) from None


def _classify_bounds(lo, hi, where: str) -> Step:
    """Return the step that time bounds describe."""
    ends = [_exclusive_end(h) for h in hi]
    if all(
        _midnight(a)
        and (a.month, a.day) == (1, 1)
        and (b.year, b.month, b.day) == (a.year + 1, 1, 1)
        for a, b in zip(lo, ends, strict=True)
    ):
        return Step("year")
    if all(
        _midnight(a)
        and a.day == 1
        and b.day == 1
        and (b.year * 12 + b.month) - (a.year * 12 + a.month) == 1
        for a, b in zip(lo, ends, strict=True)
    ):
        return Step("month")
    lengths = []
    for a, b in zip(lo, ends, strict=True):
        d = b - a
        lengths.append(d.days if d.seconds == 0 and d.microseconds == 0 and _midnight(a) else None)
    if None not in lengths:
        n = max(lengths)
        if all(x == n for x in lengths):
            return Step("day", n)
        if all(x == n or (b.month, b.day) == (1, 1) for x, b in zip(lengths, ends, strict=True)):
            return Step("day", n, restart_yearly=True)
    a, b = lo[0], hi[0]
    raise RasterError(
        f"{where}: the time bounds are not whole months, years, days or N-day periods (the "
        f"first runs from {a} to {b}); give every= ('month', '16 days', …) to say what each "
        "time step covers"
    )


def _infer_step(stamps, where: str) -> Step:
    """Return the step of time stamps without bounds: months, years or days only."""
    s = sorted(stamps)
    if len(s) < 2:
        raise RasterError(
            f"{where}: one time step and no time bounds, so the length of its period is unknown; "
            "give every= ('month', 'year', 'day', '16 days')"
        )
    gaps = [(b - a).total_seconds() / 86400 for a, b in zip(s, s[1:], strict=False)]
    years = {c.year for c in s}
    months = {(c.year, c.month) for c in s}
    days = {(c.year, c.month, c.day) for c in s}
    if len(years) == len(s) and min(gaps) >= 359:
        return Step("year")
    if len(months) == len(s) and min(gaps) >= 27:
        return Step("month")
    if len(days) == len(s) and 0.99 <= min(gaps) <= 1.01:
        return Step("day")
    raise RasterError(
        f"{where}: the time steps are neither months, years nor days apart and the file has no "
        "time bounds, so each step's period is unknown; add time bounds to the file or give "
        "every= ('16 days', …)"
    )


def _cube_periods(stamps, bounds, every, calendar: str, where: str) -> tuple[Step, list[Period]]:
    """Step and the period of each time index."""
    if bounds is not None:
        lo = [min(a, b) for a, b in bounds]
        hi = [max(a, b) for a, b in bounds]
        starts = lo
    else:
        lo = hi = None
        starts = list(stamps)
    if every is not None:
        step = parse_every(every)
    elif bounds is not None:
        step = _classify_bounds(lo, hi, where)
    else:
        step = _infer_step(starts, where)
    if step.unit == "day" and step.count > 1 and calendar not in _GREGORIAN:
        raise RasterError(
            f"{where}: {step.text} periods in the {calendar} calendar cannot be matched to "
            "calendar dates; only months, years and days can"
        )
    if step.unit == "day":
        dates = [
            _calendar_date(c, f"{where}, time index {i}", calendar) for i, c in enumerate(starts)
        ]
    else:
        # Months and years are matched by their calendar labels, so any
        # calendar works (a noleap February is February).
        dates = [dt.date(c.year, c.month if step.unit == "month" else 1, 1) for c in starts]
    check_starts(step, [(d, f"time index {i}") for i, d in enumerate(dates)], f"{where}: time step")
    anchor = min(dates)
    periods = [step.period(step.start_of(d, anchor)) for d in dates]
    seen: dict[Period, int] = {}
    for i, p in enumerate(periods):
        if p in seen:
            raise RasterError(
                f"{where}: time indexes {seen[p]} and {i} both fall in period {p.label} "
                f"(every {step.text}); give the right every=, or split the cube"
            )
        seen[p] = i
    return step, periods


def open_cube(
    path,
    *,
    variable: str,
    crs=None,
    time_name: str | None = None,
    every=None,
    nodata=None,
    scale: float | None = None,
    offset: float | None = None,
    valid_range=None,
    ceiling: float | None = None,
    name: str | None = None,
) -> SeriesIndex:
    """Open one variable of a NetCDF cube as a series.

    The file is opened with xarray (engine ``netcdf4``, else ``h5netcdf`` or
    ``scipy``, whichever is installed and reads it) without decoding, so
    blocks hold the stored numbers and :meth:`CubeSource.to_values` applies
    the CF packing (``_FillValue``, ``missing_value``, ``scale_factor``,
    ``add_offset``, ``valid_range`` / ``valid_min`` / ``valid_max`` in packed
    units).

    Time comes from the file: the time coordinate decoded with cftime in its
    own calendar (``noleap``, ``360_day``, … work), and its bounds (the
    ``bounds`` attribute, or a ``time_bnds`` / ``time_bounds`` variable) give
    each step's period: whole months, years, days or N-day periods. Without
    bounds, steps a month, a year or a day apart are recognised, each
    stamp belonging to the period that contains it (mid-month stamps are
    months). Months and years are matched by their labels in any calendar;
    days must be Gregorian calendar dates (a ``360_day`` 30 February is
    refused) and N-day periods need a Gregorian calendar.

    The grid is a covextract :class:`Grid`, north-up: ascending latitudes
    (south first) are flipped when blocks are read. A geographic grid given
    in 0..360 longitudes is converted to -180..180: a global grid is rolled
    (the columns east of 180° come first), a grid wholly east of 180° is
    shifted by -360°; so units at negative longitudes find their pixels.
    A regional grid that straddles 180° keeps its 0..360 coordinates (it
    cannot be rolled without a hole): units west of 180° then need
    longitudes above 180 to land on it. A global grid whose column edges do
    not fall on 180° keeps half a column beyond 180° on one side.

    netCDF/HDF5 reads hold a global lock, so a cube's blocks do not decode
    in parallel the way GeoTIFF blocks do.

    Parameters
    ----------
    path : str or Path
        NetCDF file (netCDF-4/HDF5 or netCDF-3).
    variable : str
        The data variable; its dimensions are time and two spatial
        dimensions (other dimensions must have length 1).
    crs : str, optional
        CRS of the grid; overrides the file's CF grid mapping (the
        variable's ``grid_mapping`` attribute, read by pyproj
        ``CRS.from_cf``). One of the two is required.
    time_name : str, optional
        The time dimension, when it is not recognisable (CF ``axis: T``,
        ``standard_name: time``, units "… since …", or named ``time``).
    every : str, optional
        Period length (:func:`parse_every`) when the file's bounds do not
        say it or are missing; each time stamp (or lower bound) then
        belongs to the period of ``every`` that contains it (N-day periods:
        that it starts).
    nodata, scale, offset, valid_range, ceiling :
        Override or add to the file's packing attributes, with the meaning
        of :func:`~covextract.io.rasters.open_layer` (``valid_range`` in
        physical units).
    name : str, optional
        Layer name, used in messages.

    Returns
    -------
    SeriesIndex
        Its sources are :class:`CubeSource` objects sharing one file handle
        per process.

    Raises
    ------
    InputFileError
        The file is missing or no installed engine reads it.
    RasterError
        No such variable, no time axis (the message lists the variable's
        dimensions), no CRS, an irregular grid, unreadable times, two time
        steps in one period.
    """
    path = Path(path)
    label = f"cube of layer {name!r}" if name else "cube"
    _check_path(path, label)
    ds, engine = _open_dataset(path, label)
    try:
        return _open_cube(
            ds,
            engine,
            path,
            label,
            variable,
            crs,
            time_name,
            every,
            nodata,
            scale,
            offset,
            valid_range,
            ceiling,
        )
    finally:
        ds.close()


def _open_cube(
    ds,
    engine,
    path,
    label,
    variable,
    crs,
    time_name,
    every,
    nodata,
    scale,
    offset,
    valid_range,
    ceiling,
) -> SeriesIndex:
    if variable not in ds.data_vars:
        names = ", ".join(repr(str(v)) for v in ds.data_vars) or "none"
        raise RasterError(
            f"{label} {path} has no variable {variable!r}; its data variables are: {names}. "
            "Set variable: to one of them."
        )
    var = ds[variable]
    where = f"{label} {path}, variable {variable!r}"
    dims = [str(d) for d in var.dims]
    shown_dims = ", ".join(f"{d} ({var.sizes[d]})" for d in dims) or "none"
    if time_name is not None:
        if time_name not in dims:
            raise RasterError(
                f"{where} has no dimension {time_name!r}: its dimensions are {shown_dims}"
            )
        tdim = time_name
    else:
        tdims = [d for d in dims if _looks(ds, d) == "t"]
        if not tdims:
            raise RasterError(
                f"{where} has no time axis: its dimensions are {shown_dims}. A series needs "
                "one; name it with time_name= if it is not recognised, or use the file as a "
                "single raster layer."
            )
        tdim = tdims[0]
    others = [d for d in dims if d != tdim]
    fixed = {}
    if len(others) > 2:
        fixed = {d: 0 for d in others if var.sizes[d] == 1}
        others = [d for d in others if d not in fixed]
    if len(others) != 2:
        raise RasterError(
            f"{where} has dimensions {shown_dims}; a cube needs time and exactly two spatial "
            "dimensions (others of length 1)"
        )
    kinds = [_looks(ds, d) for d in others]
    if kinds == ["x", "y"]:
        xdim, ydim = others
    else:
        ydim, xdim = others  # CF order (T, Y, X)

    x0, dx, width = _axis(ds, xdim, where)
    y0, dy, height = _axis(ds, ydim, where)
    grid_crs = _cube_crs(ds, var, crs, where)

    col_index = np.arange(width)
    x_flipped = dx < 0
    if x_flipped:
        col_index = col_index[::-1]
        x0, dx = x0 + dx * (width - 1), -dx
    row_index = np.arange(height)
    if dy > 0:  # south first: the grid is north-up, so rows are read bottom to top
        row_index = row_index[::-1]
        top = y0 + dy * (height - 1) + dy / 2
    else:
        top = y0 - dy / 2
    west = x0 - dx / 2
    rolled = False
    if grid_crs.is_geographic and west + dx * width > 180 + 1e-9 * dx:
        if west >= 180 - 1e-9 * dx:
            west -= 360.0
        elif abs(dx * width - 360.0) <= 1e-6 * 360.0:
            k = int(round((180.0 - west) / dx))
            k = min(max(k, 0), width)
            col_index = np.roll(col_index, -k)
            west = west + k * dx - 360.0
            rolled = k not in (0, width)
    from affine import Affine

    transform = Affine(dx, 0.0, west, 0.0, -abs(dy), top)
    chunks = var.encoding.get("chunksizes")
    chunk = dict(zip(dims, chunks, strict=False)) if chunks else {}
    block_rows = int(chunk.get(ydim, 1))
    block_cols = width if rolled or x_flipped else int(chunk.get(xdim, width))
    grid = Grid(transform, width, height, grid_crs, (block_rows, block_cols))

    conv = _packing(var, nodata, scale, offset, valid_range, ceiling)

    tvar = ds.variables.get(tdim)
    if tvar is None or tvar.ndim != 1:
        raise RasterError(f"{where}: time dimension {tdim!r} has no coordinate values")
    units = tvar.attrs.get("units")
    cal = str(tvar.attrs.get("calendar", "standard")).lower()
    stamps = _cf_dates(tvar.values, units, cal, f"{where}, time {tdim!r}")
    bname = tvar.attrs.get("bounds")
    if not bname:
        bname = next(
            (
                n
                for n in (f"{tdim}_bnds", f"{tdim}_bounds", "time_bnds", "time_bounds")
                if n in ds.variables
            ),
            None,
        )
    bounds = None
    if bname:
        bvar = ds.variables.get(bname)
        if bvar is None or bvar.shape != (tvar.size, 2):
            raise RasterError(
                f"{where}: time bounds {bname!r} are missing or not of shape (time, 2)"
            )
        bounds = _cf_dates(
            bvar.values,
            bvar.attrs.get("units", units),
            str(bvar.attrs.get("calendar", cal)).lower(),
            f"{where}, bounds {bname!r}",
        )
    step, periods = _cube_periods(stamps, bounds, every, cal, where)
    cube = _CubeFile(path, engine, variable, (tdim, ydim, xdim), fixed, row_index, col_index)
    steps = {p: i for i, p in enumerate(periods)}
    return SeriesIndex(step, _CubeBackend(cube, steps, grid, conv), origin=str(path))


def _scalar(v) -> float:
    arr = np.asarray(v, dtype=np.float64).ravel()
    return float(arr[0])


def _packing(var, nodata, scale, offset, valid_range, ceiling) -> dict:
    """Nodata, scale, offset and valid range of a variable (CF attributes, then overrides)."""
    attrs = var.attrs
    nd: list[float] = []
    for key in ("_FillValue", "missing_value"):
        if key in attrs:
            nd.extend(float(v) for v in np.asarray(attrs[key], dtype=np.float64).ravel())
    if nodata is not None:
        nd.extend(float(v) for v in (nodata if isinstance(nodata, list | tuple) else [nodata]))
    s = float(scale) if scale is not None else _scalar(attrs.get("scale_factor", 1.0))
    o = float(offset) if offset is not None else _scalar(attrs.get("add_offset", 0.0))
    vr = None
    if valid_range is not None:
        vr = (float(valid_range[0]), float(valid_range[1]))
    else:
        lo_hi = None
        if "valid_range" in attrs:
            r = np.asarray(attrs["valid_range"], dtype=np.float64).ravel()
            lo_hi = (float(r[0]), float(r[1]))
        elif "valid_min" in attrs or "valid_max" in attrs:
            lo_hi = (
                _scalar(attrs.get("valid_min", -math.inf)),
                _scalar(attrs.get("valid_max", math.inf)),
            )
        if lo_hi is not None:
            # CF states the valid range in packed (stored) units.
            ends = sorted(v * s + o for v in lo_hi)
            vr = (ends[0], ends[1])
    return {
        "dtype": str(var.dtype),
        "nodata": tuple(dict.fromkeys(nd)),
        "scale": s,
        "offset": o,
        "valid_range": vr,
        "ceiling": float(ceiling) if ceiling is not None else None,
    }
