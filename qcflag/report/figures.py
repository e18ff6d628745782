"""Report figures: station map, profiles coloured by grade, T-S diagram.

Every figure is built on :class:`matplotlib.figure.Figure` (never pyplot, whose global state
leaks memory in long runs) with the Agg canvas. Each plot function takes an optional ``ax``
and returns a small dataclass holding what it drew -- which levels, at which coordinates, in
which colour and shape -- together with the matplotlib artists, so tests and the HTML page's
``figure-data`` block can check a figure by its data rather than by its pixels.
"""

from __future__ import annotations

import base64
import io
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from qcflag.report.palette import GRADE_STYLES, NO_GRADE, grade_colours

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "Bathymetry",
    "ProfilePlot",
    "StationMap",
    "TSDiagram",
    "figure_to_data_uri",
    "new_figure",
    "packaged_bathymetry",
    "plot_profile_figure",
    "plot_profile_variable",
    "plot_station_map",
    "plot_ts_diagram",
]

_UNITS = {"temperature": "\u00b0C", "salinity": "PSS-78", "pressure": "dbar"}
_GRADE_ORDER = (1, 2, 3, 4, NO_GRADE)


def new_figure(width: float, height: float, **adjust: float) -> Figure:
    """Return a :class:`~matplotlib.figure.Figure` on the Agg canvas (no pyplot).

    Margins are fixed (``adjust`` goes to :meth:`~matplotlib.figure.Figure.subplots_adjust`)
    rather than solved by a layout engine, which would draw every figure twice.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    if adjust:
        fig.subplots_adjust(**adjust)
    return fig


def figure_to_data_uri(fig: Figure, *, dpi: float = 80) -> str:
    """Render `fig` as a PNG and return it as a ``data:image/png;base64,...`` URI."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def _scatter_by_grade(
    ax: Axes, x: NDArray[np.float64], y: NDArray[np.float64], grade: NDArray[np.int64],
    *, size: float = 22, zorder: float = 3,
) -> list[Any]:
    """Scatter points grouped by grade: one call per grade (five at most), never per level."""
    artists = []
    for g in _GRADE_ORDER:
        sel = grade == g
        if not sel.any():
            continue
        st = GRADE_STYLES[g]
        s = size * (0.6 if g == NO_GRADE else 1.0)
        artists.append(
            ax.scatter(x[sel], y[sel], s=s, c=st.colour, marker=st.marker, label=st.label,
                       edgecolors="black" if g >= 3 else "none", linewidths=0.4,
                       zorder=zorder + g)
        )
    return artists


# --------------------------------------------------------------------------- profiles
@dataclass
class ProfilePlot:
    """What :func:`plot_profile_variable` drew for one variable of one profile.

    Attributes
    ----------
    variable : str
        ``"temperature"`` or ``"salinity"``.
    level : ndarray of int
        Position within the profile (0 = first level) of every level drawn; levels whose
        value or pressure is NaN are not drawn.
    pressure, value : ndarray of float
        Coordinates of the drawn levels, dbar and the variable's units.
    auto_grade, manual_grade : ndarray of int
        Grade of each drawn level (0 = no ordinal grade).
    auto_colour, manual_colour : ndarray of str
        Colour each drawn level was given in the main panel and in the manual strip.
    artists : list
        The matplotlib artists.
    """

    variable: str
    level: NDArray[np.int64]
    pressure: NDArray[np.float64]
    value: NDArray[np.float64]
    auto_grade: NDArray[np.int64]
    manual_grade: NDArray[np.int64]
    auto_colour: NDArray[np.str_]
    manual_colour: NDArray[np.str_]
    artists: list[Any] = field(default_factory=list, repr=False)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready data (no artists)."""
        return {
            "variable": self.variable,
            "level": self.level.tolist(),
            "pressure": _finite_list(self.pressure),
            "value": _finite_list(self.value),
            "auto_grade": self.auto_grade.tolist(),
            "manual_grade": self.manual_grade.tolist(),
            "auto_colour": self.auto_colour.tolist(),
            "manual_colour": self.manual_colour.tolist(),
        }


def _finite_list(a: NDArray[np.float64], digits: int = 4) -> list[float | None]:
    r = np.round(np.asarray(a, dtype=np.float64), digits)
    return [None if not np.isfinite(v) else float(v) for v in r]


def plot_profile_variable(
    pressure: ArrayLike,
    values: ArrayLike,
    auto_grade: ArrayLike,
    manual_grade: ArrayLike,
    *,
    variable: str,
    ax: Axes | None = None,
    manual_ax: Axes | None = None,
) -> ProfilePlot:
    """Plot one variable of one profile against pressure, levels coloured by grade.

    The profile is drawn as a thin grey line with one marker per level in the colour and
    shape of its automatic grade; pressure increases downward. A narrow strip beside it
    (`manual_ax`) shows the manual grade of the same levels at the same pressures, so the
    two can be compared level by level.

    Parameters
    ----------
    pressure, values : array-like of float, shape (n,)
        Sea pressure, dbar, and the variable's values of one profile.
    auto_grade, manual_grade : array-like of int, shape (n,)
        Automatic and manual grade per level (0 = no ordinal grade).
    variable : str
        Variable name (axis label).
    ax, manual_ax : matplotlib Axes, optional
        Where to draw; new axes on a new figure when omitted (`manual_ax` shares `ax`'s
        pressure axis).

    Returns
    -------
    ProfilePlot
    """
    p = np.asarray(pressure, dtype=np.float64)
    v = np.asarray(values, dtype=np.float64)
    ga = np.asarray(auto_grade, dtype=np.int64)
    gm = np.asarray(manual_grade, dtype=np.int64)
    if ax is None:
        fig = new_figure(3.4, 4.2, left=0.2, right=0.97, bottom=0.12, top=0.95, wspace=0.08)
        ax, manual_ax = fig.subplots(1, 2, sharey=True, width_ratios=[5, 1])
    elif manual_ax is None:
        manual_ax = ax.inset_axes((1.02, 0.0, 0.12, 1.0), sharey=ax)
    drawn = np.isfinite(p) & np.isfinite(v)
    level = np.flatnonzero(drawn)
    pd_, vd, gad, gmd = p[drawn], v[drawn], ga[drawn], gm[drawn]
    artists: list[Any] = []
    artists += ax.plot(vd, pd_, color="#555555", lw=0.7, zorder=1)
    artists += _scatter_by_grade(ax, vd, pd_, gad)
    ax.set_xlabel(f"{variable} ({_UNITS.get(variable, '')})")
    ax.set_ylabel("pressure (dbar)")
    ax.grid(True, lw=0.3, alpha=0.5)
    artists += _scatter_by_grade(manual_ax, np.zeros(pd_.size), pd_, gmd, size=18)
    manual_ax.set_xlim(-1, 1)
    manual_ax.set_xticks([0], ["manual"])
    manual_ax.tick_params(axis="y", labelleft=False)
    manual_ax.set_title("")
    if not ax.yaxis_inverted():
        ax.invert_yaxis()  # pressure increases downward (shared with the manual strip)
    return ProfilePlot(
        variable=variable, level=level, pressure=pd_, value=vd, auto_grade=gad,
        manual_grade=gmd, auto_colour=grade_colours(gad), manual_colour=grade_colours(gmd),
        artists=artists,
    )


def plot_profile_figure(
    pressure: ArrayLike,
    variables: dict[str, tuple[ArrayLike, ArrayLike, ArrayLike]],
    *,
    title: str = "",
) -> tuple[Figure, dict[str, ProfilePlot]]:
    """One figure for one profile: a panel plus manual strip per variable.

    Parameters
    ----------
    pressure : array-like of float, shape (n,)
        Sea pressure, dbar.
    variables : dict
        ``variable -> (values, auto_grade, manual_grade)``, drawn left to right.
    title : str
        Figure title (the profile id).

    Returns
    -------
    fig : matplotlib Figure
    plots : dict of str to ProfilePlot
    """
    names = list(variables)
    width = 1.0 + 2.6 * len(names)
    fig = new_figure(width, 3.8, left=0.75 / width, right=1 - 0.1 / width, bottom=0.13,
                     top=0.9, wspace=0.08)
    ratios = [5, 1] * len(names)
    axes = fig.subplots(1, 2 * len(names), sharey=True, width_ratios=ratios, squeeze=False)[0]
    plots = {}
    for i, name in enumerate(names):
        vals, ga, gm = variables[name]
        plots[name] = plot_profile_variable(
            pressure, vals, ga, gm, variable=name, ax=axes[2 * i], manual_ax=axes[2 * i + 1]
        )
        if i:
            axes[2 * i].set_ylabel("")
            axes[2 * i].tick_params(axis="y", labelleft=False)
    if title:
        fig.suptitle(title, fontsize=10)
    return fig, plots


# --------------------------------------------------------------------------- map
@dataclass(frozen=True)
class Bathymetry:
    """A gridded elevation field.

    Parameters
    ----------
    longitude : ndarray of float, shape (n_lon,)
        Degrees east, increasing.
    latitude : ndarray of float, shape (n_lat,)
        Degrees north, increasing.
    elevation : ndarray of float, shape (n_lat, n_lon)
        Height above sea level, m (negative in the ocean).
    source : str
        Where the grid comes from (shown under the map).
    """

    longitude: NDArray[np.float64]
    latitude: NDArray[np.float64]
    elevation: NDArray[np.float64]
    source: str = ""


def packaged_bathymetry() -> Bathymetry:
    """Load the bathymetry grid packaged with qcflag as a :class:`Bathymetry`.

    Accepts the forms :func:`qcflag.reference.load_bathymetry` may return: an
    :class:`xarray.DataArray` (or a one-variable Dataset) on latitude/longitude coordinates,
    with elevation in metres positive up (depth positive down is converted).
    """
    from qcflag.reference import load_bathymetry

    raw = load_bathymetry()
    if isinstance(raw, Bathymetry):
        return raw
    da = raw
    if hasattr(raw, "data_vars"):  # a Dataset: take its (first) elevation-like variable
        names = list(raw.data_vars)
        pick = [n for n in names if any(k in n.lower() for k in ("elev", "depth", "topo",
                                                                   "bathy", "height", "z"))]
        da = raw[(pick or names)[0]]
    dims = {d.lower(): d for d in da.dims}
    lat_name = next(dims[d] for d in dims if d.startswith("lat") or d == "y")
    lon_name = next(dims[d] for d in dims if d.startswith("lon") or d == "x")
    da = da.transpose(lat_name, lon_name).sortby(lat_name).sortby(lon_name)
    elev = np.asarray(da.values, dtype=np.float64)
    attrs = {**getattr(raw, "attrs", {}), **da.attrs}
    positive = str(da.attrs.get("positive", "up")).lower()
    name = str(da.name or "").lower()
    if positive == "down" or ("depth" in name and np.nanmedian(elev) > 0):
        elev = -elev
    source = str(attrs.get("source") or attrs.get("title") or "packaged bathymetry")
    return Bathymetry(
        longitude=np.asarray(da[lon_name].values, dtype=np.float64),
        latitude=np.asarray(da[lat_name].values, dtype=np.float64),
        elevation=elev,
        source=source,
    )


@dataclass
class StationMap:
    """What :func:`plot_station_map` drew.

    Attributes
    ----------
    label : list of str
        Label of each station marker (the profile id), in input order.
    longitude, latitude : ndarray of float
        Marker positions, degrees.
    grade : ndarray of int
        Worst automatic grade of each profile, which sets the marker colour and shape.
    colour : ndarray of str
        Marker colours.
    extent : tuple of float
        ``(lon_min, lon_max, lat_min, lat_max)`` of the map.
    depth_levels : list of float
        Depth contour levels shaded, m (positive down); empty without bathymetry.
    grid_shape : tuple of int
        Shape of the bathymetry sub-grid drawn, ``(n_lat, n_lon)``.
    bathymetry_source : str
        Source of the grid.
    artists : list
    """

    label: list[str]
    longitude: NDArray[np.float64]
    latitude: NDArray[np.float64]
    grade: NDArray[np.int64]
    colour: NDArray[np.str_]
    extent: tuple[float, float, float, float]
    depth_levels: list[float]
    grid_shape: tuple[int, int]
    bathymetry_source: str
    artists: list[Any] = field(default_factory=list, repr=False)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready data (no artists)."""
        return {
            "label": list(self.label),
            "longitude": _finite_list(self.longitude),
            "latitude": _finite_list(self.latitude),
            "grade": self.grade.tolist(),
            "colour": self.colour.tolist(),
            "extent": [round(float(e), 4) for e in self.extent],
            "depth_levels": list(self.depth_levels),
            "grid_shape": list(self.grid_shape),
            "bathymetry_source": self.bathymetry_source,
        }


_DEPTH_LEVELS = (0, 200, 500, 1000, 2000, 3000, 4000, 5000, 6000, 8000, 11000)


def _wrap_near(lon: NDArray[np.float64], centre: float) -> NDArray[np.float64]:
    """Longitudes shifted by multiples of 360 into ``[centre - 180, centre + 180)``."""
    return centre + np.mod(np.asarray(lon, dtype=np.float64) - centre + 180.0, 360.0) - 180.0


def _unwrap_stations(lon: NDArray[np.float64]) -> NDArray[np.float64]:
    """Station longitudes made continuous across the antimeridian, in the first one's convention.

    Stations that do not straddle +-180 come back unchanged.
    """
    ok = np.isfinite(lon)
    if not ok.any():
        return lon
    rad = np.deg2rad(lon[ok])
    mean = float(np.rad2deg(np.arctan2(np.sin(rad).mean(), np.cos(rad).mean())))
    first = float(lon[ok][0])
    centre = first + ((mean - first + 180.0) % 360.0) - 180.0
    return np.where(ok, _wrap_near(lon, centre), lon)


def _map_extent(
    lon: NDArray[np.float64], lat: NDArray[np.float64], box_aspect: float = 1.3
) -> tuple[float, float, float, float]:
    """Return a padded extent around the stations that fills a `box_aspect` box.

    `box_aspect` is the axes' width/height; the extent is widened in longitude or latitude
    so that, at the local scale (longitude degrees shrink by cos(lat)), it fills the box.
    """
    ok = np.isfinite(lon) & np.isfinite(lat)
    if not ok.any():
        return (-180.0, 180.0, -80.0, 80.0)
    lo, hi = float(lon[ok].min()), float(lon[ok].max())
    la, lb = float(lat[ok].min()), float(lat[ok].max())
    pad = max(0.5, 0.12 * max(hi - lo, lb - la))
    cx, cy = (lo + hi) / 2, (la + lb) / 2
    half_x = max((hi - lo) / 2 + pad, 1.5)
    half_y = max((lb - la) / 2 + pad, 1.0)
    coslat = max(float(np.cos(np.deg2rad(cy))), 0.1)
    if half_x * coslat / half_y < box_aspect:  # too tall: widen
        half_x = box_aspect * half_y / coslat
    else:  # too wide: heighten
        half_y = half_x * coslat / box_aspect
    south, north = max(cy - half_y, -90.0), min(cy + half_y, 90.0)
    return (cx - half_x, cx + half_x, south, north)


def _label_offsets(n: int) -> list[tuple[float, float]]:
    """Alternate label positions (points) around successive stations to limit overlaps."""
    cycle = [(5, 5), (5, -11), (-5, 5), (-5, -11)]
    return [cycle[i % 4] for i in range(n)]


def plot_station_map(
    longitude: ArrayLike,
    latitude: ArrayLike,
    labels: list[str],
    grade: ArrayLike,
    *,
    bathymetry: Bathymetry | None = None,
    ax: Axes | None = None,
) -> StationMap:
    """Plot station positions on shaded, contoured bathymetry.

    Depth is shaded in greys (deeper is darker) so the grade colours of the station
    markers stand out; land is a pale sand colour and the coastline a black line. Each
    station is labelled with its profile id and drawn in the colour and shape of the
    profile's worst automatic grade.

    Parameters
    ----------
    longitude, latitude : array-like of float, shape (n_profiles,)
        Station positions, degrees east and north.
    labels : list of str
        Label per station (profile id).
    grade : array-like of int, shape (n_profiles,)
        Worst automatic grade per profile.
    bathymetry : Bathymetry, optional
        Elevation grid; the map is drawn without one when None.
    ax : matplotlib Axes, optional
        Where to draw; a new figure when omitted.

    Returns
    -------
    StationMap
    """
    lon = _unwrap_stations(np.asarray(longitude, dtype=np.float64))
    lat = np.asarray(latitude, dtype=np.float64)
    g = np.asarray(grade, dtype=np.int64)
    if ax is None:
        ax = new_figure(6.5, 5.0, left=0.1, right=0.86, bottom=0.1, top=0.97).subplots()
    fig = ax.get_figure()
    box = ax.get_position()
    fw, fh = fig.get_size_inches()
    extent = _map_extent(lon, lat, box_aspect=(box.width * fw) / (box.height * fh))
    artists: list[Any] = []
    levels: list[float] = []
    shape = (0, 0)
    source = ""
    if bathymetry is not None:
        ba, be = bathymetry.latitude, bathymetry.elevation
        # put the grid's longitudes in the stations' convention (0..360 or -180..180)
        bl = _wrap_near(bathymetry.longitude, (extent[0] + extent[1]) / 2)
        order = np.argsort(bl, kind="stable")
        bl, be = bl[order], be[:, order]
        step_x = float(np.median(np.diff(bl))) if bl.size > 1 else 1.0
        step_y = float(np.median(np.diff(ba))) if ba.size > 1 else 1.0
        ix = (bl >= extent[0] - step_x) & (bl <= extent[1] + step_x)
        iy = (ba >= extent[2] - step_y) & (ba <= extent[3] + step_y)
        if ix.sum() >= 2 and iy.sum() >= 2:
            sub = be[np.ix_(iy, ix)]
            x, y = bl[ix], ba[iy]
            shape = (int(y.size), int(x.size))
            source = bathymetry.source
            depth = -sub
            deepest = float(np.nanmax(depth)) if np.isfinite(depth).any() else 0.0
            levels = [float(v) for v in _DEPTH_LEVELS if v < deepest]
            if deepest > 0:
                levels.append(float(min(v for v in _DEPTH_LEVELS if v >= deepest)))
            if len(levels) >= 2:
                cf = ax.contourf(x, y, np.where(depth > 0, depth, np.nan), levels=levels,
                                 cmap="Greys", vmin=-0.3 * levels[-1], vmax=1.2 * levels[-1])
                artists.append(cf)
                # the colour bar sits outside the map box and takes no space from it
                cb = fig.colorbar(cf, cax=ax.inset_axes((1.03, 0.1, 0.035, 0.8)))
                cb.set_label("depth (m)")
                cb.ax.invert_yaxis()
                lines = [v for v in (1000.0, 2000.0, 4000.0) if v in levels[1:-1]]
                if lines:
                    cs = ax.contour(x, y, depth, levels=lines, colors="#444444",
                                    linewidths=0.4)
                    ax.clabel(cs, fmt="%d m", fontsize=6)
                    artists.append(cs)
            land = np.where(sub >= 0, 1.0, np.nan)
            if np.isfinite(land).any():
                artists.append(ax.contourf(x, y, land, levels=[0.5, 1.5], colors=["#E8DCC0"]))
                if (sub < 0).any():
                    artists.append(ax.contour(x, y, sub, levels=[0.0], colors="black",
                                              linewidths=0.7))
    artists += ax.plot(lon, lat, color="#333333", lw=0.6, ls=":", zorder=2)
    artists += _scatter_by_grade(ax, lon, lat, g, size=46, zorder=4)
    offsets = _label_offsets(lon.size)
    for i in range(lon.size):  # one label per station (profiles, not levels)
        if np.isfinite(lon[i]) and np.isfinite(lat[i]):
            dx, dy = offsets[i]
            artists.append(ax.annotate(
                labels[i], (lon[i], lat[i]), xytext=(dx, dy), textcoords="offset points",
                fontsize=7, zorder=10, ha="left" if dx > 0 else "right",
                bbox={"boxstyle": "round,pad=0.15", "fc": "white", "ec": "none",
                      "alpha": 0.75}))
    ax.set_xlim(extent[0], extent[1])
    ax.set_ylim(extent[2], extent[3])
    mid = np.deg2rad((extent[2] + extent[3]) / 2)
    ax.set_aspect(1.0 / max(np.cos(mid), 0.1))
    ax.set_xlabel("longitude (\u00b0E)")
    ax.set_ylabel("latitude (\u00b0N)")
    return StationMap(
        label=list(labels), longitude=lon, latitude=lat, grade=g, colour=grade_colours(g),
        extent=tuple(float(e) for e in extent), depth_levels=levels, grid_shape=shape,
        bathymetry_source=source, artists=artists,
    )


# --------------------------------------------------------------------------- T-S
@dataclass
class TSDiagram:
    """What :func:`plot_ts_diagram` drew.

    Attributes
    ----------
    index : ndarray of int
        Index (into the input arrays) of every level drawn; levels lacking a finite
        temperature, salinity or pressure are left out.
    SA, CT : ndarray of float
        Absolute Salinity (g/kg) and Conservative Temperature (degC) of the drawn levels
        (TEOS-10, from gsw).
    grade : ndarray of int
        Grade that set each point's colour (the worse of its temperature and salinity
        automatic grades).
    colour : ndarray of str
    SA_grid, CT_grid : ndarray of float
        Axes of the grid on which potential density was contoured.
    sigma0 : ndarray of float, shape (len(CT_grid), len(SA_grid))
        ``gsw.sigma0`` on the grid, kg/m3.
    sigma0_levels : list of float
        Contour levels drawn and labelled, kg/m3 (potential density anomaly, 0 dbar).
    artists : list
    """

    index: NDArray[np.int64]
    SA: NDArray[np.float64]
    CT: NDArray[np.float64]
    grade: NDArray[np.int64]
    colour: NDArray[np.str_]
    SA_grid: NDArray[np.float64]
    CT_grid: NDArray[np.float64]
    sigma0: NDArray[np.float64]
    sigma0_levels: list[float]
    artists: list[Any] = field(default_factory=list, repr=False)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready data (no artists, no grid values)."""
        return {
            "index": self.index.tolist(),
            "SA": _finite_list(self.SA),
            "CT": _finite_list(self.CT),
            "grade": self.grade.tolist(),
            "colour": self.colour.tolist(),
            "SA_range": [float(self.SA_grid[0]), float(self.SA_grid[-1])]
            if self.SA_grid.size else [],
            "CT_range": [float(self.CT_grid[0]), float(self.CT_grid[-1])]
            if self.CT_grid.size else [],
            "sigma0_levels": list(self.sigma0_levels),
        }


def _nice_step(span: float) -> float:
    for step in (0.1, 0.2, 0.25, 0.5, 1.0, 2.0):
        if span / step <= 12:
            return step
    return 5.0


def plot_ts_diagram(
    salinity: ArrayLike,
    temperature: ArrayLike,
    pressure: ArrayLike,
    longitude: ArrayLike,
    latitude: ArrayLike,
    grade: ArrayLike,
    *,
    ax: Axes | None = None,
    n_grid: int = 80,
) -> TSDiagram:
    """Conservative Temperature against Absolute Salinity with sigma0 contours.

    Practical salinity and in-situ temperature are converted with TEOS-10 (``gsw``):
    ``SA = gsw.SA_from_SP(SP, p, lon, lat)``, ``CT = gsw.CT_from_t(SA, t, p)``. Potential
    density anomaly referenced to 0 dbar, ``gsw.sigma0(SA, CT)``, is contoured on a regular
    SA/CT grid spanning the data, with labelled contours.

    Parameters
    ----------
    salinity, temperature, pressure : array-like of float, shape (n,)
        Practical salinity (PSS-78), in-situ temperature (degC, ITS-90), sea pressure (dbar).
    longitude, latitude : array-like of float, shape (n,)
        Position of each level, degrees.
    grade : array-like of int, shape (n,)
        Grade that colours each point.
    ax : matplotlib Axes, optional
        Where to draw; a new figure when omitted.
    n_grid : int, default=80
        Grid points per axis for the density field.

    Returns
    -------
    TSDiagram
    """
    import gsw

    sp = np.asarray(salinity, dtype=np.float64)
    t = np.asarray(temperature, dtype=np.float64)
    p = np.asarray(pressure, dtype=np.float64)
    lon = np.asarray(longitude, dtype=np.float64)
    lat = np.asarray(latitude, dtype=np.float64)
    g = np.asarray(grade, dtype=np.int64)
    ok = np.isfinite(sp) & np.isfinite(t) & np.isfinite(p) & np.isfinite(lon) & np.isfinite(lat)
    ok &= (sp > 0) & (sp < 50)  # gsw is defined for 0 < SP < 42 (with a little headroom)
    idx = np.flatnonzero(ok)
    SA = np.asarray(gsw.SA_from_SP(sp[ok], p[ok], lon[ok], lat[ok]), dtype=np.float64)
    CT = np.asarray(gsw.CT_from_t(SA, t[ok], p[ok]), dtype=np.float64)
    good = np.isfinite(SA) & np.isfinite(CT)
    idx, SA, CT, gd = idx[good], SA[good], CT[good], g[ok][good]
    if ax is None:
        ax = new_figure(5.5, 4.6, left=0.13, right=0.97, bottom=0.11, top=0.93).subplots()
    artists: list[Any] = []
    sa_grid = ct_grid = np.zeros(0)
    sig = np.zeros((0, 0))
    levels: list[float] = []
    if SA.size:
        sa_lo, sa_hi = np.percentile(SA, [0.5, 99.5]) if SA.size > 20 else (SA.min(), SA.max())
        ct_lo, ct_hi = np.percentile(CT, [0.5, 99.5]) if CT.size > 20 else (CT.min(), CT.max())
        sa_pad = max(0.1, 0.08 * (sa_hi - sa_lo))
        ct_pad = max(0.5, 0.08 * (ct_hi - ct_lo))
        sa_grid = np.linspace(sa_lo - sa_pad, sa_hi + sa_pad, n_grid)
        ct_grid = np.linspace(ct_lo - ct_pad, ct_hi + ct_pad, n_grid)
        SAg, CTg = np.meshgrid(sa_grid, ct_grid)
        sig = np.asarray(gsw.sigma0(SAg, CTg), dtype=np.float64)
        lo, hi = float(np.nanmin(sig)), float(np.nanmax(sig))
        step = _nice_step(hi - lo)
        levels = [round(v, 3) for v in np.arange(np.ceil(lo / step) * step, hi, step)]
        if levels:
            cs = ax.contour(sa_grid, ct_grid, sig, levels=levels, colors="#777777",
                            linewidths=0.6, zorder=1)
            ax.clabel(cs, fmt="%.2f" if step < 0.5 else "%.1f", fontsize=7)
            artists.append(cs)
        artists += _scatter_by_grade(ax, SA, CT, gd, size=16)
        ax.set_xlim(sa_grid[0], sa_grid[-1])
        ax.set_ylim(ct_grid[0], ct_grid[-1])
    ax.set_xlabel("Absolute Salinity $S_A$ (g/kg)")
    ax.set_ylabel("Conservative Temperature $\\Theta$ (\u00b0C)")
    ax.set_title("contours: $\\sigma_0$ (kg/m$^3$), TEOS-10", fontsize=9)
    ax.grid(True, lw=0.3, alpha=0.4)
    return TSDiagram(
        index=idx, SA=SA, CT=CT, grade=gd, colour=grade_colours(gd), SA_grid=sa_grid,
        CT_grid=ct_grid, sigma0=sig, sigma0_levels=levels, artists=artists,
    )
