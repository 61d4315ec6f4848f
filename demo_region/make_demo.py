"""Generate the invented demo region (every name and value is made up).

Run ``python demo_region/make_demo.py`` to rewrite, next to this file:

- ``region.gpkg``: layer ``basins`` (48 polygons, EPSG:32633) and layer ``soils``;
- ``dem.tif``: 100 m elevation grid (float32);
- ``series.csv.gz``: daily precipitation, PET, temperature and observed flow, 2001-2020;
- ``truth.json``: the hidden relation between the storage constant k and the attributes.

The generator is deterministic: one seed, split into independent streams per component, so the
same files come out on every run. Observed flow is simulated with ``regional.simulate`` from a
storage constant that follows a known linear relation in log space on attributes computed by
``regional.attributes.compute_attributes`` from the very files written here, so a regression in
the tool can be checked against the truth.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pyogrio
import rasterio
import shapely
from affine import Affine
from scipy import ndimage, signal, stats

import regional
from regional import io
from regional.attributes import compute_attributes
from regional.models import get_model

HERE = Path(__file__).resolve().parent
SEED = 20_240_917
CRS = "EPSG:32633"
START, END = "2001-01-01", "2020-12-31"

# Grid: 400 x 300 cells of 100 m; lower-left corner at (480 km E, 6040 km N) of UTM 33N, a spot
# at sea chosen so that nothing real lies under the invented terrain.
CELL_M = 100.0
N_COLS, N_ROWS = 400, 300
X0_M, Y0_M = 480_000.0, 6_040_000.0
INSET_M = 1_500.0  # basins stay this far inside the grid

N_HEADWATERS = 43
N_UNGAUGED = 14

# The hidden relation: ln k = b0 + b1 slope_mean + b2 aridity + b3 sand_frac + e, e ~ N(0, sd).
COEFFICIENTS = {"intercept": -2.5, "slope_mean": 0.12, "aridity": -1.4, "sand_frac": -2.0}
COEFFICIENT_UNITS = {
    "intercept": "ln(1/day)",
    "slope_mean": "ln(1/day) per degree",
    "aridity": "ln(1/day) per unit PET/P",
    "sand_frac": "ln(1/day) per unit sand fraction",
}
MODEL = "linear"  # evapotranspiration declines below the model's reference storage
# The snow store is pinned here rather than left to the model's defaults, so the observed flow
# stays what it is if those defaults change.
SNOW = {"snow_threshold_c": 1.0, "melt_threshold_c": 0.0, "melt_factor_mm_per_degc_day": 3.0}
MEAN_TEMP_SEA_LEVEL_C = 11.3
# Summers with fewer, larger storms on the low eastern levels: the wet-day chance swings by a
# further LOWLAND_SUMMER_DRYING over the year at sea level, fading out at LOWLAND_TOP_M.
LOWLAND_SUMMER_DRYING = 0.3
LOWLAND_TOP_M = 250.0  # annual mean air temperature at sea level, degC
RESIDUAL_SD = 0.25  # ln units: what the attributes do not explain
# Multiplicative observation error (mean one) in ln units: a slow AR(1) part (rating-curve drift,
# forcing error; lag-one correlation 0.95) plus independent daily scatter.
FLOW_NOISE_SLOW_SD, FLOW_NOISE_LAG1 = 0.15, 0.95
FLOW_NOISE_DAILY_SD = 0.10

# Nested outlets: (id-free key, river, hand-drawn zone in km from the grid's lower-left corner
# that picks the headwater cells whose seeds lie inside it).
NESTED = (
    ("selvain_upper", "Selvain", (1.5, 11.0, 11.0, 19.0)),
    ("selvain_middle", "Selvain", (1.5, 20.0, 10.0, 20.0)),
    ("selvain_lower", "Selvain", (1.5, 30.0, 8.5, 21.5)),
    ("ondrel", "Ondrel", (24.0, 38.5, 21.5, 28.5)),
    ("maskeld", "Maskeld", (6.0, 19.0, 1.5, 7.0)),
)
STREAMS = (
    "Selvain",
    "Ondrel",
    "Maskeld",
    "Quorrin Beck",
    "Halvask Water",
    "Turnelbrook",
    "Ystrel",
    "Lunnock Burn",
    "Vornick",
    "Feldane Water",
    "Ebbrin",
    "Corvelle Beck",
    "Pellinash",
    "Garrowsike",
)
PLACES = (
    "Ashvell Bridge", "Brennoch Mill", "Corvaine Ford", "Dunmarrow", "Eskaby Weir",
    "Farrowgill", "Glimmerstane", "Hollinsgarth", "Ivelmoor", "Jorrickby",
    "Kelvanby", "Lathercombe", "Mirrowfield", "Nethersike", "Orlanby Foot",
    "Pennistowe", "Quelby Cross", "Rathmarrow", "Skellanby", "Tollerwick Mill",
    "Ullanstead", "Varrowby", "Wendelgarth", "Yarrowstane", "Zennick Bridge",
    "Alderquay", "Brackenmoss", "Cawderby", "Drennock Ford", "Ellerwain",
    "Fallowmire", "Gorsethwaite", "Hethermoss", "Inglestowe", "Kestrelby",
    "Lowmarrow", "Moorvane", "Nennick Foot", "Oakenvell", "Pryddle Mill",
    "Ravensike", "Sallowby", "Thornvell", "Umberstane", "Vellanby",
    "Whinmarrow", "Yewthwaite", "Brisk Levels Weir",
)  # fmt: skip


def build_demo(
    out_dir: str | Path = HERE, *, start: str = START, end: str = END, seed: int = SEED
) -> dict:
    """Write the demo region's files into ``out_dir`` and return the truth record.

    Parameters
    ----------
    out_dir : path, default this folder
        Where ``region.gpkg``, ``dem.tif``, ``series.csv.gz`` and ``truth.json`` are written.
    start, end : str, default "2001-01-01", "2020-12-31"
        Period of the daily series (at least two years: the warm-up takes 365 days).
    seed : int
        Seed of every random stream.

    Returns
    -------
    dict
        The content of ``truth.json``.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rng = _streams(seed)
    dem = _terrain(rng["terrain"])
    cells, seeds_km = _headwater_cells(rng["basins"])
    basins, members = _basins(cells, seeds_km, rng["basins"])
    soils = _soils(rng["soils"])
    _write_spatial(out, basins, soils, dem)
    region = _read_back(out)
    dates = pd.date_range(start, end, freq="D")
    static = _static_attributes(region, dates)
    forcing = _weather(rng["weather"], dates, static, members, basins)
    attributes = compute_attributes(
        region["basins"],
        precip_mm=forcing["precip_mm"],
        pet_mm=forcing["pet_mm"],
        temp_c=forcing["temp_c"],
        overlays=[region["soils"]],
        dem=region["dem"],
    ).table
    k_per_day, residual = _true_k(rng["k"], attributes)
    gauged = _choose_gauged(rng["flow"], members)
    flow = _observed_flow(rng["flow"], forcing, k_per_day, gauged)
    _write_series(out / "series.csv.gz", forcing, flow)
    truth = _truth(seed, dates, basins, members, attributes, k_per_day, residual, flow)
    (out / "truth.json").write_text(json.dumps(truth, indent=1) + "\n")
    return truth


# ----------------------------------------------------------------------------- random streams


def _streams(seed: int) -> dict[str, np.random.Generator]:
    names = ("terrain", "basins", "soils", "weather", "k", "flow")
    children = np.random.SeedSequence(seed).spawn(len(names))
    return {
        name: np.random.default_rng(child) for name, child in zip(names, children, strict=True)
    }


# ----------------------------------------------------------------------------- terrain


def _terrain(rng: np.random.Generator) -> dict:
    """Fells in the west (to ~1400 m) falling to low levels in the east, with smooth hills."""
    x_km = (np.arange(N_COLS) + 0.5) * CELL_M / 1000.0
    y_km = (N_ROWS - np.arange(N_ROWS) - 0.5) * CELL_M / 1000.0
    xx, yy = np.meshgrid(x_km, y_km)
    upland = np.clip(1.0 - xx / 40.0, 0.0, 1.0)
    base = 60.0 + 650.0 * upland**1.6 + 60.0 * np.sin(yy / 30.0 * np.pi)
    hills = _smooth_noise(rng, sigma_cells=9.0)
    broad = _smooth_noise(rng, sigma_cells=30.0)
    elevation = base + (25.0 + 230.0 * upland**1.2) * hills + 90.0 * broad
    elevation = np.maximum(elevation, 5.0)
    transform = Affine(CELL_M, 0.0, X0_M, 0.0, -CELL_M, Y0_M + N_ROWS * CELL_M)
    return {"values": elevation.astype(np.float32), "transform": transform}


def _smooth_noise(rng: np.random.Generator, *, sigma_cells: float) -> np.ndarray:
    field = ndimage.gaussian_filter(rng.standard_normal((N_ROWS, N_COLS)), sigma_cells)
    return (field - field.mean()) / field.std()


# ----------------------------------------------------------------------------- basins


def _headwater_cells(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Voronoi cells of jittered seeds, bent by a smooth displacement so edges meander."""
    grid = np.array([(i + 0.5, j + 0.5) for j in range(6) for i in range(8)], dtype=float)
    spacing = np.array([(40.0 - 2 * INSET_M / 1000) / 8, (30.0 - 2 * INSET_M / 1000) / 6])
    seeds_km = INSET_M / 1000 + (grid + rng.uniform(-0.35, 0.35, grid.shape)) * spacing
    keep = np.sort(rng.choice(len(seeds_km), N_HEADWATERS, replace=False))
    seeds_km = seeds_km[keep]
    outline = shapely.box(INSET_M, INSET_M, N_COLS * CELL_M - INSET_M, N_ROWS * CELL_M - INSET_M)
    points = shapely.points(seeds_km * 1000.0)
    cells = shapely.voronoi_polygons(shapely.multipoints(points), extend_to=outline, ordered=True)
    cells = shapely.intersection(np.asarray(shapely.get_parts(cells)), outline)
    cells = shapely.segmentize(cells, 150.0)
    waves = [(rng.uniform(2.5, 6.0), rng.uniform(0, 2 * np.pi), rng.uniform(0, 2 * np.pi))
             for _ in range(6)]  # fmt: skip

    def bend(xy: np.ndarray) -> np.ndarray:  # amplitude 6 x 60 m, slope < 1: no folds
        shifted = xy.copy()
        for n, (wavelength_km, angle, phase) in enumerate(waves):
            direction = np.array([np.cos(angle), np.sin(angle)])
            arg = 2 * np.pi * (xy @ direction) / (wavelength_km * 1000.0) + phase
            shifted[:, n % 2] += 60.0 * np.sin(arg)
        return shifted

    cells = shapely.transform(cells, lambda xy: bend(xy) + np.array([X0_M, Y0_M]))
    cells = shapely.set_precision(cells, 0.01)
    return cells, seeds_km


def _basins(
    cells: np.ndarray, seeds_km: np.ndarray, rng: np.random.Generator
) -> tuple[gpd.GeoDataFrame, dict[str, list[str]]]:
    """Headwater cells plus nested outlets (unions of cells), ids DR01.. from west to east."""
    keys = [f"cell{i:02d}" for i in range(len(cells))]
    members = {key: [key] for key in keys}
    geoms = dict(zip(keys, cells, strict=True))
    rivers = _streams_of_cells(seeds_km, rng)
    for key, river, (x0, x1, y0, y1) in NESTED:
        inside = [
            k for k, (x, y) in zip(keys, seeds_km, strict=True) if x0 <= x <= x1 and y0 <= y <= y1
        ]
        members[key] = inside
        geoms[key] = shapely.set_precision(shapely.union_all([geoms[k] for k in inside]), 0.01)
        rivers[key] = river
    order = sorted(
        geoms, key=lambda k: (round(geoms[k].centroid.x / 2000.0), -geoms[k].centroid.y)
    )
    ids = {key: f"DR{n + 1:02d}" for n, key in enumerate(order)}
    places = rng.permutation(PLACES)
    frame = gpd.GeoDataFrame(
        {
            "name": [f"{rivers[k]} at {places[n]}" for n, k in enumerate(order)],
            "river": [rivers[k] for k in order],
            "forest_frac": np.round(rng.uniform(0.05, 0.75, len(order)), 2),
        },
        geometry=[geoms[k] for k in order],
        crs=CRS,
        index=pd.Index([ids[k] for k in order], name="basin_id"),
    )
    nested_members = {ids[k]: [ids[m] for m in members[k]] for k in order}
    return frame, nested_members


def _streams_of_cells(seeds_km: np.ndarray, rng: np.random.Generator) -> dict[str, str]:
    """Neighbouring cells share a stream name: each cell takes the nearest stream centre's."""
    centres = rng.uniform([0, 0], [40, 30], (len(STREAMS) - 3, 2))
    distance = np.hypot(*(seeds_km[:, None, :] - centres[None, :, :]).transpose(2, 0, 1))
    nearest = distance.argmin(axis=1)
    return {f"cell{i:02d}": STREAMS[3 + j] for i, j in enumerate(nearest)}


def _soils(rng: np.random.Generator) -> gpd.GeoDataFrame:
    """Soil map units: sandier to the south (outwash), water capacity falling with sand.

    One unsurveyed patch (a reservoir and its shore) leaves a few basins partly uncovered.
    """
    seeds = rng.uniform([0, 0], [N_COLS * CELL_M, N_ROWS * CELL_M], (34, 2))
    extent = shapely.box(0, 0, N_COLS * CELL_M, N_ROWS * CELL_M)
    units = shapely.voronoi_polygons(
        shapely.multipoints(shapely.points(seeds)), extend_to=extent, ordered=True
    )
    units = shapely.intersection(np.asarray(shapely.get_parts(units)), extent)
    unsurveyed = shapely.Point(27_500, 13_000).buffer(1_400, quad_segs=32)
    units = shapely.difference(units, unsurveyed)
    north = seeds[:, 1] / (N_ROWS * CELL_M)
    sand = np.clip(0.72 - 0.55 * north + rng.normal(0, 0.1, len(seeds)), 0.05, 0.92)
    awc = np.clip(230.0 - 170.0 * sand + rng.normal(0, 12.0, len(seeds)), 40.0, 260.0)
    frame = gpd.GeoDataFrame(
        {
            "unit": [f"SU{n + 1:02d}" for n in range(len(seeds))],
            "sand_frac": np.round(sand, 3),
            "awc_mm": np.round(awc, 1),
        },
        geometry=shapely.transform(units, lambda xy: xy + np.array([X0_M, Y0_M])),
        crs=CRS,
    )
    return frame


def _write_spatial(out: Path, basins: gpd.GeoDataFrame, soils: gpd.GeoDataFrame, dem: dict):
    gpkg = out / "region.gpkg"
    gpkg.unlink(missing_ok=True)
    pyogrio.set_gdal_config_options({"OGR_CURRENT_DATE": "2024-01-01T00:00:00.000Z"})
    basins.reset_index().to_file(gpkg, layer="basins", driver="GPKG")
    soils.to_file(gpkg, layer="soils", driver="GPKG")
    profile = {
        "driver": "GTiff",
        "height": N_ROWS,
        "width": N_COLS,
        "count": 1,
        "dtype": "float32",
        "crs": CRS,
        "transform": dem["transform"],
        "nodata": -9999.0,
        "compress": "deflate",
        "predictor": 3,
        "tiled": True,
        "blockxsize": 256,
        "blockysize": 256,
    }
    with rasterio.open(out / "dem.tif", "w", **profile) as dataset:
        dataset.write(dem["values"], 1)


def _read_back(out: Path) -> dict:
    """The files as the tool reads them, so attributes are computed exactly as it will."""
    gpkg = out / "region.gpkg"
    return {
        "basins": io.read_basins(gpkg, "basins", id_field="basin_id"),
        "soils": io.read_overlay(gpkg, "soils", fields=["sand_frac", "awc_mm"]),
        "dem": io.read_raster(out / "dem.tif"),
    }


def _static_attributes(region: dict, dates: pd.DatetimeIndex) -> pd.DataFrame:
    """Centroids and mean elevations that drive the weather (series not needed yet)."""
    ones = pd.DataFrame(1.0, index=dates[:1], columns=region["basins"].index)
    return compute_attributes(
        region["basins"], precip_mm=ones, pet_mm=ones, dem=region["dem"]
    ).table


# ----------------------------------------------------------------------------- weather


def _weather(
    rng: np.random.Generator,
    dates: pd.DatetimeIndex,
    static: pd.DataFrame,
    members: dict[str, list[str]],
    basins: gpd.GeoDataFrame,
) -> dict[str, pd.DataFrame]:
    """Daily weather on the headwater cells, area-averaged onto the nested outlets, rounded."""
    heads = [b for b, m in members.items() if m == [b]]
    elevation = static.loc[heads, "elevation_mean"].to_numpy()
    xy_km = np.column_stack(
        [basins.geometry[heads].centroid.x / 1000.0, basins.geometry[heads].centroid.y / 1000.0]
    )
    doy = dates.day_of_year.to_numpy()[:, None]
    precip = _precipitation(rng, doy, elevation, xy_km)
    temp = _temperature(rng, doy, elevation)
    pet = _oudin_pet(doy, temp, static.loc[heads, "centroid_lat"].to_numpy())
    heads_frame = {
        "precip_mm": pd.DataFrame(precip, index=dates, columns=heads),
        "pet_mm": pd.DataFrame(pet, index=dates, columns=heads),
        "temp_c": pd.DataFrame(temp, index=dates, columns=heads),
    }
    weights = _member_weights(members, basins, heads)
    decimals = {"precip_mm": 1, "pet_mm": 2, "temp_c": 1}
    return {
        name: (frame @ weights).round(decimals[name])[list(basins.index)]
        for name, frame in heads_frame.items()
    }


def _precipitation(
    rng: np.random.Generator, doy: np.ndarray, elevation: np.ndarray, xy_km: np.ndarray
) -> np.ndarray:
    """Occurrence and amount from one latent Gaussian field: near cells share storms.

    Latent z: spatial correlation exp(-d / 25 km) between cells, AR(1) in time (lag-one 0.45).
    A day is wet where Phi(z) > 1 - p_wet; the amount is the gamma quantile of the rescaled
    exceedance (a Gaussian copula), so storms are larger where the field is higher. Annual mean
    grows 0.6 mm per m of elevation and varies by a smooth storm-track factor (about +-20 %,
    independent of the relief); winters are wetter.
    """
    n_days, n = doy.shape[0], len(elevation)
    distance = np.hypot(*(xy_km[:, None, :] - xy_km[None, :, :]).transpose(2, 0, 1))
    chol = np.linalg.cholesky(np.exp(-distance / 25.0) + 1e-9 * np.eye(n))
    rho = 0.45
    shocks = rng.standard_normal((n_days, n)) @ chol.T
    latent = signal.lfilter([np.sqrt(1 - rho**2)], [1.0, -rho], shocks, axis=0)
    season = np.cos(2 * np.pi * (doy - 15) / 365.25)
    lowland = np.clip(1.0 - elevation / LOWLAND_TOP_M, 0.0, 1.0)
    seasonality = 0.08 + LOWLAND_SUMMER_DRYING * lowland
    p_wet = np.clip(0.40 + seasonality * season + 0.12 * elevation / 1000.0, 0.05, 0.95)
    track = np.exp(0.2 * _storm_track(rng, xy_km))
    mean_mm = (560.0 + 0.6 * elevation) * track / 365.25 * (1.0 + 0.2 * season)
    u = stats.norm.cdf(latent)
    wet = u > 1.0 - p_wet
    exceed = np.clip((u - (1.0 - p_wet)) / p_wet, 1e-9, 1 - 1e-9)
    shape = 0.7
    amount = stats.gamma.ppf(exceed, shape) * mean_mm / (p_wet * shape)
    return np.where(wet, amount, 0.0)


def _storm_track(rng: np.random.Generator, xy_km: np.ndarray) -> np.ndarray:
    """A smooth standard-normal-ish field at the cells: three random plane waves of 30-60 km."""
    waves = rng.uniform([30.0, 0.0, 0.0], [60.0, np.pi, 2 * np.pi], (3, 3))
    field = sum(
        np.sin(2 * np.pi * (xy_km @ [np.cos(a), np.sin(a)]) / length + phase)
        for length, a, phase in waves
    )
    return (field - field.mean()) / field.std()


def _temperature(rng: np.random.Generator, doy: np.ndarray, elevation: np.ndarray) -> np.ndarray:
    """Seasonal cycle, lapse rate 6.5 degC/km, a regional AR(1) anomaly and local noise."""
    n_days, n = doy.shape[0], len(elevation)
    rho, sd = 0.8, 2.5
    regional_anomaly = signal.lfilter(
        [sd * np.sqrt(1 - rho**2)], [1.0, -rho], rng.standard_normal(n_days)
    )
    cycle = 8.5 * np.cos(2 * np.pi * (doy - 200) / 365.25)
    local = rng.normal(0.0, 0.4, (n_days, n))
    return MEAN_TEMP_SEA_LEVEL_C - 0.0065 * elevation + cycle + regional_anomaly[:, None] + local


def _oudin_pet(doy: np.ndarray, temp_c: np.ndarray, lat_deg: np.ndarray) -> np.ndarray:
    """PET (mm/day) by Oudin et al. (2005, J. Hydrol. 303): Re / (lambda rho) (T + 5) / 100.

    Re: extraterrestrial radiation (MJ m-2 day-1) from FAO-56 (Allen et al. 1998, eqs. 21-25);
    lambda = 2.45 MJ/kg; PET = 0 when T <= -5 degC.
    """
    phi = np.radians(lat_deg)[None, :]
    dr = 1 + 0.033 * np.cos(2 * np.pi * doy / 365)
    delta = 0.409 * np.sin(2 * np.pi * doy / 365 - 1.39)
    ws = np.arccos(np.clip(-np.tan(phi) * np.tan(delta), -1.0, 1.0))
    ra = (
        24 * 60 / np.pi * 0.0820 * dr
        * (ws * np.sin(phi) * np.sin(delta) + np.cos(phi) * np.cos(delta) * np.sin(ws))
    )  # fmt: skip
    return np.where(temp_c + 5.0 > 0.0, ra / 2.45 * (temp_c + 5.0) / 100.0, 0.0)


def _member_weights(
    members: dict[str, list[str]], basins: gpd.GeoDataFrame, heads: list[str]
) -> pd.DataFrame:
    """(headwater cell x basin) area weights: a nested outlet averages its cells."""
    weights = pd.DataFrame(0.0, index=heads, columns=list(basins.index))
    area = basins.geometry.area
    for basin, cells in members.items():
        weights.loc[cells, basin] = area[cells].to_numpy() / area[cells].sum()
    return weights


# ----------------------------------------------------------------------------- flow


def _true_k(rng: np.random.Generator, attributes: pd.DataFrame) -> tuple[pd.Series, pd.Series]:
    residual = pd.Series(rng.normal(0.0, RESIDUAL_SD, len(attributes)), index=attributes.index)
    log_k = COEFFICIENTS["intercept"] + residual
    for name in ("slope_mean", "aridity", "sand_frac"):
        log_k = log_k + COEFFICIENTS[name] * attributes[name]
    return np.exp(log_k).rename("k_per_day"), residual


def _observed_flow(
    rng: np.random.Generator,
    forcing: dict[str, pd.DataFrame],
    k_per_day: pd.Series,
    gauged: list[str],
) -> pd.DataFrame:
    """Simulated flow times lognormal error (mean one), with gaps; NaN at ungauged basins."""
    ids = list(forcing["precip_mm"].columns)
    simulation = regional.simulate(
        MODEL,
        forcing["precip_mm"].to_numpy(),
        forcing["pet_mm"].to_numpy(),
        {"k_per_day": k_per_day[ids].to_numpy(), **SNOW},
        temp=forcing["temp_c"].to_numpy(),
        warmup_days=365,
    )
    rho = FLOW_NOISE_LAG1
    slow = signal.lfilter(
        [FLOW_NOISE_SLOW_SD * np.sqrt(1 - rho**2)], [1.0, -rho],
        rng.standard_normal(simulation.flow.shape), axis=0,
    )  # fmt: skip
    daily = rng.normal(0.0, FLOW_NOISE_DAILY_SD, simulation.flow.shape)
    noise = np.exp(slow + daily - (FLOW_NOISE_SLOW_SD**2 + FLOW_NOISE_DAILY_SD**2) / 2)
    flow = pd.DataFrame(simulation.flow * noise, index=forcing["precip_mm"].index, columns=ids)
    flow.loc[:, [b for b in ids if b not in gauged]] = np.nan
    _punch_gaps(rng, flow, gauged)
    return flow.round(3)


def _choose_gauged(rng: np.random.Generator, members: dict[str, list[str]]) -> list[str]:
    """Nested outlets are all gauged; N_UNGAUGED of the headwater cells are not."""
    heads = sorted(b for b, cells in members.items() if len(cells) == 1)
    ungauged = set(rng.choice(heads, N_UNGAUGED, replace=False))
    return sorted(b for b in members if b not in ungauged)


def _punch_gaps(rng: np.random.Generator, flow: pd.DataFrame, gauged: list[str]) -> None:
    """A late-opening gauge, an early-closing one and 1-3 outages at a dozen gauges."""
    dates = flow.index
    chosen = rng.choice(gauged, 14, replace=False)
    flow.loc[dates < "2004-04-01", chosen[0]] = np.nan
    flow.loc[dates > "2017-09-30", chosen[1]] = np.nan
    for basin in chosen[2:]:
        for _ in range(rng.integers(1, 4)):
            first = rng.integers(0, len(dates))
            flow.iloc[first : first + rng.integers(5, 90), flow.columns.get_loc(basin)] = np.nan


def _write_series(path: Path, forcing: dict[str, pd.DataFrame], flow: pd.DataFrame) -> None:
    columns = {**forcing, "flow_mm": flow}
    long = pd.concat(
        {name: frame.stack(future_stack=True) for name, frame in columns.items()}, axis=1
    )
    long.index = long.index.set_names(["date", "basin_id"])
    long = long.reset_index().sort_values(["basin_id", "date"], kind="stable")
    long["date"] = long["date"].dt.strftime("%Y-%m-%d")
    long = long[["basin_id", "date", "precip_mm", "pet_mm", "temp_c", "flow_mm"]]
    long.to_csv(
        path,
        index=False,
        float_format="%.6g",
        compression={"method": "gzip", "compresslevel": 9, "mtime": 0},
    )


# ----------------------------------------------------------------------------- truth


def _truth(
    seed: int,
    dates: pd.DatetimeIndex,
    basins: gpd.GeoDataFrame,
    members: dict[str, list[str]],
    attributes: pd.DataFrame,
    k_per_day: pd.Series,
    residual: pd.Series,
    flow: pd.DataFrame,
) -> dict:
    gauged = flow.notna().any(axis=0)
    per_basin = {}
    for basin in basins.index:
        inside = [
            b for b, cells in members.items() if b != basin and set(cells) < set(members[basin])
        ]
        per_basin[basin] = {
            "name": basins.loc[basin, "name"],
            "gauged": bool(gauged[basin]),
            "k_per_day": float(k_per_day[basin]),
            "ln_k_residual": float(residual[basin]),
            "slope_mean": float(attributes.loc[basin, "slope_mean"]),
            "aridity": float(attributes.loc[basin, "aridity"]),
            "sand_frac": float(attributes.loc[basin, "sand_frac"]),
            "contains": sorted(inside),
        }
    return {
        "about": "Invented demo region: every name and value is made up (see README.md).",
        "seed": seed,
        "period": [str(dates[0].date()), str(dates[-1].date())],
        "model": {
            "name": MODEL,
            "evaporation_reference_mm": get_model(MODEL).evaporation_reference_mm,
            "snow": SNOW,
            "warmup_days": 365,
        },
        "relation": "ln(k_per_day) = intercept + slope_mean*b1 + aridity*b2 + sand_frac*b3 + e",
        "coefficients": COEFFICIENTS,
        "coefficient_units": COEFFICIENT_UNITS,
        "attribute_units": {"slope_mean": "degrees", "aridity": "PET/P (-)", "sand_frac": "-"},
        "residual_sd_ln": RESIDUAL_SD,
        "flow_noise": {
            "kind": "multiplicative lognormal, mean one: slow AR(1) part plus daily scatter",
            "slow_sd_ln": FLOW_NOISE_SLOW_SD,
            "slow_lag1": FLOW_NOISE_LAG1,
            "daily_sd_ln": FLOW_NOISE_DAILY_SD,
        },
        "counts": {
            "basins": len(basins),
            "gauged": int(gauged.sum()),
            "ungauged": int((~gauged).sum()),
            "nested_outlets": sum(1 for v in per_basin.values() if v["contains"]),
        },
        "basins": per_basin,
    }


if __name__ == "__main__":
    record = build_demo(HERE)
    counts = record["counts"]
    sys.stdout.write(
        f"demo region written to {HERE}: {counts['basins']} basins, {counts['gauged']} gauged, "
        f"{counts['ungauged']} ungauged, {counts['nested_outlets']} nested outlets\n"
    )
