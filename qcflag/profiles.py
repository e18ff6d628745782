"""The ragged batch of profiles that every part of qcflag works on.

All levels of all profiles live in flat 1-D arrays; ``offsets`` marks where each profile
starts, as in a CF contiguous ragged array: profile ``i`` is ``slice(offsets[i],
offsets[i + 1])``. Per-profile metadata is a small :class:`pandas.DataFrame` with one row
per profile. Checks are vectorised over the flat arrays, with neighbour operations masked
at profile boundaries (see :attr:`ProfileBatch.first_level` and friends).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from qcflag.exceptions import InvalidProfileError, QCFlagError
from qcflag.schemes import NO_FLAG, decode, get_scheme

if TYPE_CHECKING:
    from numpy.typing import ArrayLike, NDArray

__all__ = ["CANONICAL_UNITS", "LEVEL_VARIABLES", "META_COLUMNS", "ProfileBatch", "whole_group_ends"]

LEVEL_VARIABLES: tuple[str, ...] = ("pressure", "temperature", "salinity")
"""The measured variables of a level, in canonical order."""

CANONICAL_UNITS: dict[str, str] = {
    "pressure": "dbar",
    "temperature": "degC (ITS-90)",
    "salinity": "PSS-78",
}
"""Units every batch holds its values in; readers convert or refuse anything else."""

META_COLUMNS: tuple[str, ...] = ("profile_id", "cruise", "time", "latitude", "longitude",
                                 "platform")
"""Required per-profile metadata columns (extra columns are kept)."""


def _as_float(name: str, values: ArrayLike, n: int | None = None) -> NDArray[np.float64]:
    arr = np.asarray(values)
    if arr.dtype.kind not in "fiub":
        try:
            arr = arr.astype(np.float64)
        except (TypeError, ValueError):
            raise InvalidProfileError(f"{name}: values must be numeric") from None
    arr = np.ascontiguousarray(arr, dtype=np.float64)
    if arr.ndim != 1:
        raise InvalidProfileError(f"{name}: expected a 1-D array, got shape {arr.shape}")
    if n is not None and arr.shape[0] != n:
        raise InvalidProfileError(f"{name}: length {arr.shape[0]} differs from {n} levels")
    return arr


def whole_group_ends(groups: ArrayLike) -> NDArray[np.int64]:
    """Where a sequence of profiles may be cut so that no group is split.

    Parameters
    ----------
    groups : array-like, shape (n_profiles,)
        Group label of each profile (e.g. its cruise); missing labels are groups of one.

    Returns
    -------
    ndarray of int64
        The cut positions ``k`` in ``1..n_profiles`` (profiles ``< k`` before the cut)
        that leave every group on one side, increasing; always ends with ``n_profiles``.
    """
    codes, _ = pd.factorize(pd.Series(np.asarray(groups, dtype=object)).astype("string"),
                            use_na_sentinel=True)
    n = codes.size
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    codes = np.where(codes < 0, codes.max(initial=-1) + 1 + np.arange(n), codes)
    last = np.zeros(int(codes.max()) + 1, dtype=np.int64)
    np.maximum.at(last, codes, np.arange(n))
    reach = np.maximum.accumulate(last[codes])  # last profile any open group still needs
    return (np.flatnonzero(reach == np.arange(n)) + 1).astype(np.int64)


@dataclass(frozen=True, eq=False)
class ProfileBatch:
    """Many profiles held as flat level arrays plus profile offsets.

    Parameters
    ----------
    offsets : array-like of int, shape (n_profiles + 1,)
        ``offsets[0] == 0``, non-decreasing, ``offsets[-1] == n_levels``.
    pressure : array-like of float, shape (n_levels,)
        Sea pressure, dbar.
    temperature : array-like of float, shape (n_levels,)
        In-situ temperature, degrees Celsius (ITS-90).
    salinity : array-like of float, shape (n_levels,)
        Practical salinity (PSS-78), unitless.
    profiles : pandas.DataFrame
        One row per profile with at least :data:`META_COLUMNS`; ``time`` is
        ``datetime64[ns]`` (UTC, naive), latitude in degrees north, longitude in degrees east.
    flags : mapping of str to array of int8, optional
        Manual flags per variable (``"temperature"``, ``"salinity"``, ``"pressure"``) as
        stored codes of `scheme` (see :mod:`qcflag.schemes`); ``NO_FLAG`` where absent.
    scheme : str, default="argo"
        Flag scale of `flags`.
    units : mapping of str to str, optional
        Units of each variable; must be :data:`CANONICAL_UNITS`.
    extra : pandas.DataFrame, optional
        Other per-level columns read from the input (kept and written back unchanged).
    attrs : dict, optional
        Free-form provenance (source files, global attributes).

    Attributes
    ----------
    n_profiles, n_levels : int
        Number of profiles and levels.

    Raises
    ------
    InvalidProfileError
        If lengths, dtypes, offsets, units or flag codes are inconsistent.
    """

    offsets: NDArray[np.int64]
    pressure: NDArray[np.float64]
    temperature: NDArray[np.float64]
    salinity: NDArray[np.float64]
    profiles: pd.DataFrame
    flags: Mapping[str, NDArray[np.int8]] = field(default_factory=dict)
    scheme: str = "argo"
    units: Mapping[str, str] = field(default_factory=lambda: dict(CANONICAL_UNITS))
    extra: pd.DataFrame | None = None
    attrs: dict[str, Any] = field(default_factory=dict)

    def __post_init__(self) -> None:
        off = np.asarray(self.offsets)
        if off.dtype.kind not in "iu" or off.ndim != 1 or off.size < 1:
            raise InvalidProfileError("offsets: expected a 1-D integer array starting at 0")
        off = np.ascontiguousarray(off, dtype=np.int64)
        if off[0] != 0 or (np.diff(off) < 0).any():
            raise InvalidProfileError("offsets: must start at 0 and never decrease")
        n = int(off[-1])
        object.__setattr__(self, "offsets", off)
        for name in LEVEL_VARIABLES:
            object.__setattr__(self, name, _as_float(name, getattr(self, name), n))
        prof = self.profiles
        if not isinstance(prof, pd.DataFrame):
            raise InvalidProfileError("profiles: expected a pandas DataFrame")
        missing = [c for c in META_COLUMNS if c not in prof.columns]
        if missing:
            raise InvalidProfileError(f"profiles: missing metadata columns {missing}")
        if len(prof) != off.size - 1:
            raise InvalidProfileError(
                f"profiles: {len(prof)} metadata rows for {off.size - 1} profiles"
            )
        if not pd.api.types.is_datetime64_any_dtype(prof["time"]):
            raise InvalidProfileError("profiles: column 'time' must be datetime64")
        object.__setattr__(self, "profiles", prof.reset_index(drop=True))
        units = dict(self.units)
        for name, expected in CANONICAL_UNITS.items():
            if units.get(name) != expected:
                raise InvalidProfileError(
                    f"{name}: units {units.get(name)!r} are not {expected!r}; convert first"
                )
        object.__setattr__(self, "units", units)
        sch = get_scheme(self.scheme)
        object.__setattr__(self, "scheme", sch.name)
        flags = {}
        for name, codes in self.flags.items():
            if name not in LEVEL_VARIABLES:
                raise InvalidProfileError(f"flags: unknown variable {name!r}")
            arr = np.asarray(codes)
            if arr.dtype.kind not in "iu" or arr.shape != (n,):
                raise InvalidProfileError(f"{name} flags: expected int8 codes of length {n}")
            arr = np.ascontiguousarray(arr, dtype=np.int8)
            try:
                decode(arr, sch, where=f"{name} flags")
            except InvalidProfileError:
                raise
            except QCFlagError as exc:  # documented: inconsistent codes are InvalidProfileError
                raise InvalidProfileError(str(exc)) from None
            flags[name] = arr
        object.__setattr__(self, "flags", flags)
        if self.extra is not None:
            if not isinstance(self.extra, pd.DataFrame) or len(self.extra) != n:
                raise InvalidProfileError(f"extra: expected a DataFrame with {n} rows")
            object.__setattr__(self, "extra", self.extra.reset_index(drop=True))

    # ------------------------------------------------------------------ sizes
    @property
    def n_profiles(self) -> int:
        """Number of profiles."""
        return int(self.offsets.size - 1)

    @property
    def n_levels(self) -> int:
        """Number of levels over all profiles."""
        return int(self.offsets[-1])

    def __len__(self) -> int:
        return self.n_profiles

    def __repr__(self) -> str:
        cruises = self.profiles["cruise"].nunique() if self.n_profiles else 0
        return (
            f"<ProfileBatch: {self.n_profiles} profiles, {self.n_levels} levels, "
            f"{cruises} cruises, flags={sorted(self.flags)} ({self.scheme})>"
        )

    # ------------------------------------------------------- level geometry
    @cached_property
    def counts(self) -> NDArray[np.int64]:
        """Number of levels in each profile, shape (n_profiles,)."""
        return np.diff(self.offsets)

    @cached_property
    def profile_index(self) -> NDArray[np.int64]:
        """Profile number of each level, shape (n_levels,)."""
        return np.repeat(np.arange(self.n_profiles, dtype=np.int64), self.counts)

    @cached_property
    def level_index(self) -> NDArray[np.int64]:
        """Position of each level within its profile (0 at the top), shape (n_levels,)."""
        return np.arange(self.n_levels, dtype=np.int64) - self.offsets[:-1][self.profile_index]

    @cached_property
    def first_level(self) -> NDArray[np.bool_]:
        """True at the first level of each profile."""
        return self.level_index == 0

    @cached_property
    def last_level(self) -> NDArray[np.bool_]:
        """True at the last level of each profile."""
        return self.level_index == (self.counts[self.profile_index] - 1)

    def per_level(self, column: str) -> NDArray[Any]:
        """Broadcast a per-profile metadata column to levels, shape (n_levels,)."""
        return np.asarray(self.profiles[column].to_numpy())[self.profile_index]

    def values(self, name: str) -> NDArray[np.float64]:
        """Return the level array of variable `name`."""
        if name not in LEVEL_VARIABLES:
            raise KeyError(name)
        return getattr(self, name)

    # ------------------------------------------------------------ manual flags
    def manual_grade(self, name: str) -> tuple[NDArray[np.int8], NDArray[np.int8]]:
        """Decode the manual flags of `name` to (grade, state); all ABSENT if there are none."""
        codes = self.flags.get(name)
        if codes is None:
            codes = np.full(self.n_levels, NO_FLAG, dtype=np.int8)
        return decode(codes, self.scheme, where=f"{name} flags")

    # ------------------------------------------------------- slicing / concat
    def select(self, profiles: ArrayLike) -> ProfileBatch:
        """Return the batch of the given profiles (integer indices or boolean mask), in order."""
        idx = np.asarray(profiles)
        if idx.dtype == bool:
            idx = np.flatnonzero(idx)
        idx = idx.astype(np.int64)
        if idx.size and (idx.min() < -self.n_profiles or idx.max() >= self.n_profiles):
            raise IndexError("profile index out of range")
        idx = np.where(idx < 0, idx + self.n_profiles, idx)
        counts = self.counts[idx]
        offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        if idx.size and np.array_equal(idx, np.arange(idx[0], idx[0] + idx.size)):
            lo, hi = self.offsets[idx[0]], self.offsets[idx[-1] + 1]
            take: slice | NDArray[np.int64] = slice(int(lo), int(hi))
        else:
            # level indices of the chosen profiles, without a Python loop
            starts = np.repeat(self.offsets[:-1][idx] - offsets[:-1], counts)
            take = np.arange(offsets[-1], dtype=np.int64) + starts
        return self._take(offsets, take, idx)

    def _take(
        self, offsets: NDArray[np.int64], take: slice | NDArray[np.int64], idx: NDArray[np.int64]
    ) -> ProfileBatch:
        extra = None
        if self.extra is not None:
            extra = self.extra.iloc[take]
        return replace(
            self,
            offsets=offsets,
            pressure=self.pressure[take],
            temperature=self.temperature[take],
            salinity=self.salinity[take],
            profiles=self.profiles.iloc[idx],
            flags={k: v[take] for k, v in self.flags.items()},
            extra=extra,
            attrs=dict(self.attrs),
        )

    def __getitem__(self, key: int | slice | ArrayLike) -> ProfileBatch:
        if isinstance(key, (int, np.integer)):
            return self.select([int(key)])
        if isinstance(key, slice):
            return self.select(np.arange(self.n_profiles)[key])
        return self.select(key)

    def iter_chunks(self, max_levels: int, *, keep_cruises: bool = True
                    ) -> Iterable[ProfileBatch]:
        """Yield consecutive sub-batches of whole profiles with about `max_levels` levels each.

        Parameters
        ----------
        max_levels : int
            Wanted levels per chunk; a chunk closes at the first allowed profile boundary at
            or after each multiple of `max_levels`.
        keep_cruises : bool, default=True
            Never split a cruise between chunks: checks and features that compare a profile
            with the rest of its cruise (its track, the cruise's other casts) then see the
            same neighbours in a chunk as in the whole batch. A chunk may exceed
            `max_levels` to hold a whole cruise (and holds everything between two profiles
            of a cruise that the file interleaves with others).
        """
        if self.n_profiles == 0:
            return
        n = self.n_profiles
        allowed = np.arange(1, n + 1)  # chunk ends allowed after profile k - 1
        if keep_cruises and "cruise" in self.profiles.columns:
            allowed = whole_group_ends(self.profiles["cruise"])
        ends_at = self.offsets[allowed]  # level offset of each allowed end
        targets = np.arange(max_levels, self.n_levels, max_levels)
        ends = np.unique(np.append(allowed[np.minimum(
            np.searchsorted(ends_at, targets, side="left"), allowed.size - 1)], n))
        starts = np.concatenate([[0], ends[:-1]])
        for a, b in zip(starts, ends, strict=True):
            if b > a:
                yield self.select(np.arange(a, b))

    @classmethod
    def concat(cls, batches: Sequence[ProfileBatch]) -> ProfileBatch:
        """Concatenate batches (same flag scheme) into one.

        Flags present in only some batches are filled with ``NO_FLAG`` elsewhere; extra
        columns likewise with missing values.
        """
        batches = list(batches)
        if not batches:
            raise InvalidProfileError("concat: no batches given")
        if len(batches) == 1:
            return batches[0]
        schemes = {b.scheme for b in batches if b.flags}
        if len(schemes) > 1:
            raise InvalidProfileError(
                f"concat: batches use different flag schemes {sorted(schemes)}"
            )
        scheme = schemes.pop() if schemes else batches[0].scheme
        counts = np.concatenate([b.counts for b in batches])
        offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
        names = sorted({k for b in batches for k in b.flags})
        flags = {
            k: np.concatenate(
                [b.flags.get(k, np.full(b.n_levels, NO_FLAG, np.int8)) for b in batches]
            )
            for k in names
        }
        extra = None
        if any(b.extra is not None for b in batches):
            extra = pd.concat(
                [
                    b.extra if b.extra is not None else pd.DataFrame(index=range(b.n_levels))
                    for b in batches
                ],
                ignore_index=True,
            )
        return cls(
            offsets=offsets,
            pressure=np.concatenate([b.pressure for b in batches]),
            temperature=np.concatenate([b.temperature for b in batches]),
            salinity=np.concatenate([b.salinity for b in batches]),
            profiles=pd.concat([b.profiles for b in batches], ignore_index=True),
            flags=flags,
            scheme=scheme,
            extra=extra,
            attrs={"sources": [s for b in batches for s in b.attrs.get("sources", [])]},
        )

    # ------------------------------------------------------------ construction
    @classmethod
    def from_levels(
        cls,
        table: pd.DataFrame,
        *,
        flags: Mapping[str, str] | None = None,
        scheme: str = "argo",
        extra_columns: Sequence[str] = (),
    ) -> ProfileBatch:
        """Build a batch from a level table (one row per level, profiles contiguous).

        Parameters
        ----------
        table : pandas.DataFrame
            Columns ``profile_id``, ``cruise``, ``time``, ``latitude``, ``longitude``,
            ``pressure``, ``temperature``, ``salinity`` and optionally ``platform``.
            Rows of one profile must be contiguous; order within a profile is kept.
        flags : mapping of str to str, optional
            Variable name -> column holding already-parsed int8 flag codes.
        scheme : str, default="argo"
            Flag scale of the flag columns.
        extra_columns : sequence of str
            Per-level columns to keep in :attr:`extra`.

        Returns
        -------
        ProfileBatch
        """
        ids = table["profile_id"].astype(str).to_numpy()
        n = ids.size
        if n:
            change = np.flatnonzero(ids[1:] != ids[:-1]) + 1
            starts = np.concatenate([[0], change])
        else:
            starts = np.zeros(0, dtype=np.int64)
        offsets = np.append(starts, n).astype(np.int64)
        heads = table.iloc[starts]
        profiles = pd.DataFrame(
            {
                "profile_id": ids[starts],
                "cruise": heads["cruise"].astype(str).to_numpy(),
                "time": pd.to_datetime(heads["time"].to_numpy()),
                "latitude": heads["latitude"].astype(float).to_numpy(),
                "longitude": heads["longitude"].astype(float).to_numpy(),
                "platform": (
                    heads["platform"].astype(str).to_numpy()
                    if "platform" in heads
                    else np.full(starts.size, "", dtype=object)
                ),
            }
        )
        extra = table[list(extra_columns)].reset_index(drop=True) if extra_columns else None
        return cls(
            offsets=offsets,
            pressure=table["pressure"].to_numpy(),
            temperature=table["temperature"].to_numpy(),
            salinity=table["salinity"].to_numpy(),
            profiles=profiles,
            flags={k: table[c].to_numpy() for k, c in (flags or {}).items()},
            scheme=scheme,
            extra=extra,
        )

    def to_levels(self) -> pd.DataFrame:
        """Return one row per level: metadata, values, manual flag codes, extra columns."""
        pi = self.profile_index
        data: dict[str, Any] = {}
        for col in META_COLUMNS:
            data[col] = self.profiles[col].to_numpy()[pi]
        for name in LEVEL_VARIABLES:
            data[name] = getattr(self, name)
        for name, codes in self.flags.items():
            data[f"{name}_flag"] = codes
        df = pd.DataFrame(data)
        if self.extra is not None and len(self.extra.columns):
            df = pd.concat([df, self.extra], axis=1)
        return df
