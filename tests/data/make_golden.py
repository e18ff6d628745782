"""Generate the small golden files in tests/data (run: python tests/data/make_golden.py).

All data here are INVENTED test scenarios (not measurements). The files are written with the
standard library ``csv`` module and ``netCDF4`` directly, independently of qcflag's writers,
so that the reader tests compare qcflag against files it did not produce. The NetCDF layouts
follow CF-1.13 chapter 9 as summarised in ../shared/reference/formats-and-conventions.md
section 2; the Argo-like file follows section 3 (format 3.1).
"""

from __future__ import annotations

import csv
from datetime import UTC, datetime
from pathlib import Path

import netCDF4
import numpy as np

HERE = Path(__file__).resolve().parent
NAN = float("nan")

# Invented profiles. Flags are Argo reference table 2 codes ("" = no flag).
PROFILES = [
    {
        "profile_id": "A001", "cruise": "DEMO2024A", "platform": "RV Invented",
        "time": "2024-01-14T10:22:00Z", "latitude": -34.5012, "longitude": 151.2203,
        "operator": "jd",
        "pressure": [2.0, 4.0, 6.0, 8.0, 10.0],
        "temperature": [18.441, 18.4402, 18.1, 25.0, 17.9],
        "salinity": [35.512, NAN, 35.49, 35.48, 35.47],
        "pressure_flag": ["1", "1", "1", "1", "1"],
        "temperature_flag": ["1", "1", "2", "4", "1"],
        "salinity_flag": ["1", "9", "1", "1", "3"],
        "oxygen": ["210.5", "211", "", "209.25", "208.0"],
        "comment": ["", "", "spike?", "", "near, bottom"],
    },
    {
        "profile_id": "A002", "cruise": "DEMO2024A", "platform": "RV Invented",
        "time": "2024-01-14T18:05:31Z", "latitude": -34.61, "longitude": 151.3,
        "operator": "jd",
        "pressure": [1.0, 3.0, 3.0, 2.5],
        "temperature": [19.0, 18.95, 18.95, 18.9],
        "salinity": [35.4, 35.41, 35.41, 35.42],
        "pressure_flag": ["1", "1", "4", "3"],
        "temperature_flag": ["0", "", "1", "1"],
        "salinity_flag": ["0", "", "1", "1"],
        "oxygen": ["200.1", "201.7", "201.7", "202"],
        "comment": ["", "duplicate", "duplicate", "decreasing"],
    },
    {
        "profile_id": "B001", "cruise": "DEMO2024B", "platform": "",
        "time": "2023-12-31T23:59:59Z", "latitude": 0.0, "longitude": -179.99,
        "operator": "mk",
        "pressure": [1500.25],
        "temperature": [3.1415],
        "salinity": [34.9],
        "pressure_flag": [""],
        "temperature_flag": [""],
        "salinity_flag": ["1"],
        "oxygen": [""],
        "comment": ["single level"],
    },
]

CANONICAL_HEADER = ["profile_id", "cruise", "platform", "time", "latitude", "longitude",
                    "pressure", "temperature", "salinity", "pressure_flag",
                    "temperature_flag", "salinity_flag", "operator", "oxygen", "comment"]

# Argo reference table 2 tokens as qcflag.schemes.ARGO writes them (CF flag_meanings).
ARGO_VALUES = np.array([0, 1, 2, 3, 4, 5, 8, 9], dtype=np.int8)
ARGO_MEANINGS = ("no_qc_performed good_data probably_good_data "
                 "probably_bad_data_potentially_adjustable bad_data value_changed "
                 "estimated_value missing_value")


def _num(x: float) -> str:
    return "" if x != x else repr(float(x))


def write_canonical(path: Path) -> None:
    """Canonical CSV written by hand with the csv module (shortest float repr, LF)."""
    with path.open("w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(CANONICAL_HEADER)
        for p in PROFILES:
            for i in range(len(p["pressure"])):
                w.writerow([
                    p["profile_id"], p["cruise"], p["platform"], p["time"],
                    _num(p["latitude"]), _num(p["longitude"]),
                    _num(p["pressure"][i]), _num(p["temperature"][i]), _num(p["salinity"][i]),
                    p["pressure_flag"][i], p["temperature_flag"][i], p["salinity_flag"][i],
                    p["operator"], p["oxygen"][i], p["comment"][i],
                ])


def _seconds(t: str) -> float:
    dt = datetime.strptime(t, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=UTC)
    return dt.timestamp()


def _flag_codes(codes: list[str]) -> np.ndarray:
    return np.array([-128 if c == "" else int(c) for c in codes], dtype=np.int8)


def _add_profile_vars(nc: netCDF4.Dataset, dim: str, profiles: list[dict]) -> None:
    v = nc.createVariable("cast", str, (dim,))
    v.cf_role = "profile_id"
    v[:] = np.array([p["profile_id"] for p in profiles], dtype=object)
    v = nc.createVariable("expocode", str, (dim,))
    v[:] = np.array([p["cruise"] for p in profiles], dtype=object)
    v = nc.createVariable("platform", str, (dim,))
    v[:] = np.array([p["platform"] for p in profiles], dtype=object)
    v = nc.createVariable("t", "f8", (dim,))
    v.standard_name = "time"
    v.units = "seconds since 1970-01-01 00:00:00"
    v[:] = [_seconds(p["time"]) for p in profiles]
    for name, key, units in (("lat", "latitude", "degree_north"),
                             ("lon", "longitude", "degree_east")):
        v = nc.createVariable(name, "f8", (dim,))
        v.standard_name = key
        v.units = units
        v[:] = [p[key] for p in profiles]


def _data_vars(nc: netCDF4.Dataset, dims: tuple[str, ...]) -> dict[str, netCDF4.Variable]:
    out = {}
    spec = {
        "PRES": ("sea_water_pressure", "dbar", "pressure", "PRES_QC", "quality_flag"),
        "TEMP": ("sea_water_temperature", "degree_Celsius", "temperature", "TEMP_QC",
                 "quality_flag"),
        # legacy modifier form of the flag standard name (CF Appendix C; still accepted)
        "PSAL": ("sea_water_practical_salinity", "1", "salinity", "PSAL_QC",
                 "sea_water_practical_salinity status_flag"),
    }
    for name, (std, units, key, qc, qstd) in spec.items():
        v = nc.createVariable(name, "f8", dims, fill_value=-9999.0)
        v.standard_name = std
        v.units = units
        v.ancillary_variables = f"{qc} {name}_spike_test"
        q = nc.createVariable(qc, "i1", dims, fill_value=np.int8(-128))
        q.standard_name = qstd
        q.flag_values = ARGO_VALUES
        q.flag_meanings = ARGO_MEANINGS
        # a per-test flag that must not be taken for the manual flag
        s = nc.createVariable(f"{name}_spike_test", "i1", dims, fill_value=np.int8(-128))
        s.standard_name = "spike_test_quality_flag"
        out[key] = v
        out[key + "_flag"] = q
        out[key + "_spike"] = s
    return out


def _flat(key: str) -> np.ndarray:
    if key.endswith("_flag"):
        return np.concatenate([_flag_codes(p[key]) for p in PROFILES])
    return np.concatenate([np.asarray(p[key], dtype=float) for p in PROFILES])


def write_contiguous(path: Path) -> None:
    """CF contiguous ragged array (count variable with sample_dimension)."""
    n = sum(len(p["pressure"]) for p in PROFILES)
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.featureType = "profile"
        nc.Conventions = "CF-1.13"
        nc.createDimension("station", len(PROFILES))
        nc.createDimension("z_obs", n)
        _add_profile_vars(nc, "station", PROFILES)
        rs = nc.createVariable("rowSize", "i4", ("station",))
        rs.sample_dimension = "z_obs"
        rs[:] = [len(p["pressure"]) for p in PROFILES]
        vs = _data_vars(nc, ("z_obs",))
        for key, var in vs.items():
            var[:] = np.full(n, 1, np.int8) if key.endswith("_spike") else _flat(key)


def write_indexed(path: Path) -> None:
    """CF indexed ragged array: levels interleaved round-robin, prof_idx per level."""
    sizes = [len(p["pressure"]) for p in PROFILES]
    n = sum(sizes)
    owner = np.repeat(np.arange(len(PROFILES)), sizes)
    pos = np.concatenate([np.arange(s) for s in sizes])
    order = np.lexsort((owner, pos))  # level 0 of every profile, then level 1, ...
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.featureType = "profile"
        nc.createDimension("profile", len(PROFILES))
        nc.createDimension("obs", n)
        _add_profile_vars(nc, "profile", PROFILES)
        ix = nc.createVariable("prof_idx", "i4", ("obs",))
        ix.instance_dimension = "profile"
        ix[:] = owner[order]
        vs = _data_vars(nc, ("obs",))
        for key, var in vs.items():
            var[:] = np.full(n, 1, np.int8) if key.endswith("_spike") else _flat(key)[order]


def write_incomplete(path: Path) -> None:
    """CF incomplete multidimensional array, padded to the longest profile with fill."""
    width = max(len(p["pressure"]) for p in PROFILES) + 2
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.featureType = "profile"
        nc.createDimension("profile", len(PROFILES))
        nc.createDimension("obs", width)
        _add_profile_vars(nc, "profile", PROFILES)
        vs = _data_vars(nc, ("profile", "obs"))
        for key, var in vs.items():
            for i, p in enumerate(PROFILES):
                if key.endswith("_spike"):
                    var[i, : len(p["pressure"])] = 1
                elif key.endswith("_flag"):
                    var[i, : len(p["pressure"])] = _flag_codes(p[key])
                else:
                    var[i, : len(p["pressure"])] = np.asarray(p[key], dtype=float)


ORTHO_PRESSURE = [5.0, 10.0, 20.0, 50.0]
ORTHO = [
    {"profile_id": "O1", "temperature": [20.5, 20.25, 18.0, 12.125],
     "salinity": [36.1, 36.1, 36.0, 35.5], "temperature_flag": ["1", "1", "1", "1"]},
    {"profile_id": "O2", "temperature": [21.0, NAN, 17.5, 11.0],
     "salinity": [36.2, 36.15, 35.9, 35.4], "temperature_flag": ["1", "9", "1", "4"]},
]


def write_orthogonal(path: Path) -> None:
    """CF orthogonal multidimensional array: one pressure coordinate shared by all profiles."""
    with netCDF4.Dataset(path, "w", format="NETCDF4") as nc:
        nc.featureType = "profile"
        nc.createDimension("profile", len(ORTHO))
        nc.createDimension("z", len(ORTHO_PRESSURE))
        v = nc.createVariable("profile", str, ("profile",))
        v.cf_role = "profile_id"
        v[:] = np.array([p["profile_id"] for p in ORTHO], dtype=object)
        v = nc.createVariable("time", "f8", ("profile",))
        v.standard_name = "time"
        v.units = "days since 1950-01-01 00:00:00"
        v[:] = [27000.0, 27000.5]
        for name, units, val in (("lat", "degree_north", [10.0, 10.5]),
                                 ("lon", "degree_east", [-30.0, -30.5])):
            v = nc.createVariable(name, "f8", ("profile",))
            v.standard_name = "latitude" if name == "lat" else "longitude"
            v.units = units
            v[:] = val
        z = nc.createVariable("z", "f8", ("z",))
        z.standard_name = "sea_water_pressure"
        z.units = "decibar"
        z.axis = "Z"
        z[:] = ORTHO_PRESSURE
        t = nc.createVariable("temp", "f4", ("profile", "z"), fill_value=np.float32(99999.0))
        t.standard_name = "sea_water_temperature"
        t.units = "degC"
        t.ancillary_variables = "temp_qc"
        t[:] = np.array([p["temperature"] for p in ORTHO], dtype=np.float32)
        s = nc.createVariable("sal", "f8", ("profile", "z"))
        s.standard_name = "sea_water_salinity"
        s.units = "1e-3"
        s[:] = [p["salinity"] for p in ORTHO]
        q = nc.createVariable("temp_qc", "i1", ("profile", "z"), fill_value=np.int8(-128))
        q.standard_name = "quality_flag"
        q.flag_values = ARGO_VALUES
        q.flag_meanings = ARGO_MEANINGS
        q[:] = [_flag_codes(p["temperature_flag"]) for p in ORTHO]


# Invented Argo-format file: profile 0 delayed mode (adjusted values differ from raw),
# profile 1 real time, descending, with trailing padding and one level whose PRES is fill.
ARGO = {
    "platform": ["6900001", "6900001"], "cycle": [7, 8], "direction": ["A", "D"],
    "mode": ["D", "R"], "juld": [26000.25, 26010.5],
    "lat": [45.5, 45.75], "lon": [-20.125, -20.5],
    "PRES": [[5.0, 10.0, 20.0, 30.0, 40.0], [4.0, 8.0, 99999.0, 16.0, 99999.0]],
    "PRES_ADJUSTED": [[5.5, 10.5, 20.5, 30.5, 40.5], [99999.0] * 5],
    "TEMP": [[15.0, 14.5, 13.0, 12.0, 11.0], [16.0, 15.5, 15.0, 14.0, 99999.0]],
    "TEMP_ADJUSTED": [[15.25, 14.75, 13.25, 12.25, 11.25], [99999.0] * 5],
    "PSAL": [[35.0, 35.1, 35.2, 35.3, 35.4], [34.0, 34.1, 34.2, 34.3, 99999.0]],
    "PSAL_ADJUSTED": [[35.01, 35.11, 35.21, 35.31, 35.41], [99999.0] * 5],
    "PRES_QC": ["11111", "11 1 "], "PRES_ADJUSTED_QC": ["11111", "     "],
    "TEMP_QC": ["11114", "1231 "], "TEMP_ADJUSTED_QC": ["11144", "     "],
    "PSAL_QC": ["11111", "1131 "], "PSAL_ADJUSTED_QC": ["12111", "     "],
}


def write_argo(path: Path) -> None:
    """Argo profile format 3.1 skeleton (classic NetCDF, char flags, fill 99999)."""
    a = ARGO
    with netCDF4.Dataset(path, "w", format="NETCDF3_CLASSIC") as nc:
        nc.Conventions = "Argo-3.1 CF-1.6"
        nc.featureType = "trajectoryProfile"
        nc.createDimension("N_PROF", 2)
        nc.createDimension("N_LEVELS", 5)
        nc.createDimension("STRING8", 8)
        v = nc.createVariable("PLATFORM_NUMBER", "S1", ("N_PROF", "STRING8"), fill_value=b" ")
        v[:] = netCDF4.stringtochar(np.array([s.ljust(8) for s in a["platform"]], "S8"))
        v = nc.createVariable("CYCLE_NUMBER", "i4", ("N_PROF",), fill_value=99999)
        v[:] = a["cycle"]
        for name, key in (("DIRECTION", "direction"), ("DATA_MODE", "mode")):
            v = nc.createVariable(name, "S1", ("N_PROF",), fill_value=b" ")
            v[:] = np.array(a[key], dtype="S1")
        v = nc.createVariable("JULD", "f8", ("N_PROF",), fill_value=999999.0)
        v.units = "days since 1950-01-01 00:00:00 UTC"
        v[:] = a["juld"]
        for name, key in (("LATITUDE", "lat"), ("LONGITUDE", "lon")):
            v = nc.createVariable(name, "f8", ("N_PROF",), fill_value=99999.0)
            v[:] = a[key]
        units = {"PRES": "decibar", "TEMP": "degree_Celsius", "PSAL": "psu"}
        for p in ("PRES", "TEMP", "PSAL"):
            for suffix in ("", "_ADJUSTED"):
                v = nc.createVariable(p + suffix, "f4", ("N_PROF", "N_LEVELS"),
                                      fill_value=np.float32(99999.0))
                v.units = units[p]
                v[:] = np.array(a[p + suffix], dtype=np.float32)
                q = nc.createVariable(p + suffix + "_QC", "S1", ("N_PROF", "N_LEVELS"),
                                      fill_value=b" ")
                q.conventions = "Argo reference table 2"
                q[:] = np.array([list(s) for s in a[p + suffix + "_QC"]], dtype="S1")


def main() -> None:
    """Write every golden file into tests/data."""
    write_canonical(HERE / "canonical.csv")
    write_contiguous(HERE / "layout_contiguous.nc")
    write_indexed(HERE / "layout_indexed.nc")
    write_incomplete(HERE / "layout_incomplete.nc")
    write_orthogonal(HERE / "layout_orthogonal.nc")
    write_argo(HERE / "argo_synthetic.nc")


if __name__ == "__main__":
    main()
