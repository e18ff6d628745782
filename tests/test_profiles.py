import numpy as np
import pandas as pd
import pytest

from qcflag import InvalidProfileError, ProfileBatch


def _table():
    return pd.DataFrame(
        {
            "profile_id": ["a", "a", "b", "b", "b", "c"],
            "cruise": ["X", "X", "X", "X", "X", "Y"],
            "time": pd.to_datetime(["2020-01-01"] * 5 + ["2021-05-01"]),
            "latitude": [10.0, 10.0, 11.0, 11.0, 11.0, -5.0],
            "longitude": [20.0, 20.0, 21.0, 21.0, 21.0, 150.0],
            "pressure": [1.0, 2.0, 1.0, 2.0, 3.0, 5.0],
            "temperature": [10.0, 9.0, 8.0, 7.0, 6.0, 5.0],
            "salinity": [35.0] * 6,
            "tflag": np.array([1, 1, 4, 1, 9, -1], dtype=np.int8),
        }
    )


def test_from_levels_offsets_and_geometry():
    b = ProfileBatch.from_levels(_table(), flags={"temperature": "tflag"})
    assert b.n_profiles == 3 and b.n_levels == 6
    assert b.offsets.tolist() == [0, 2, 5, 6]
    assert b.level_index.tolist() == [0, 1, 0, 1, 2, 0]
    assert b.first_level.tolist() == [True, False, True, False, False, True]
    assert b.last_level.tolist() == [False, True, False, False, True, True]
    assert b.per_level("cruise").tolist() == ["X", "X", "X", "X", "X", "Y"]


def test_select_and_concat_are_inverse():
    b = ProfileBatch.from_levels(_table(), flags={"temperature": "tflag"})
    parts = [b[i] for i in range(b.n_profiles)]
    whole = ProfileBatch.concat(parts)
    np.testing.assert_array_equal(whole.temperature, b.temperature)
    np.testing.assert_array_equal(whole.flags["temperature"], b.flags["temperature"])
    assert whole.profiles["profile_id"].tolist() == ["a", "b", "c"]
    rev = b.select([2, 0])
    assert rev.pressure.tolist() == [5.0, 1.0, 2.0]
    assert rev.flags["temperature"].tolist() == [-1, 1, 1]


def test_iter_chunks_covers_every_profile_once():
    b = ProfileBatch.from_levels(_table())
    chunks = list(b.iter_chunks(2))
    assert sum(c.n_profiles for c in chunks) == 3
    assert ProfileBatch.concat(chunks).pressure.tolist() == b.pressure.tolist()


def _many(cruises):
    n = len(cruises)
    return ProfileBatch(
        offsets=np.arange(0, 3 * n + 1, 3, dtype=np.int64), pressure=np.tile([1.0, 2.0, 3.0], n),
        temperature=np.full(3 * n, 10.0), salinity=np.full(3 * n, 35.0),
        profiles=pd.DataFrame({"profile_id": [f"p{i}" for i in range(n)], "cruise": cruises,
                               "time": pd.Timestamp("2020-01-01"), "latitude": 0.0,
                               "longitude": 0.0, "platform": "x"}))


@pytest.mark.parametrize("max_levels", [1, 3, 4, 7, 100])
def test_iter_chunks_keeps_cruises_whole(max_levels):
    cruises = ["A", "A", "A", "B", "C", "B", "D", None, None, "E", "E"]  # B interleaves C
    b = _many(cruises)
    chunks = list(b.iter_chunks(max_levels))
    assert ProfileBatch.concat(chunks).profiles["profile_id"].tolist() == \
        b.profiles["profile_id"].tolist()
    seen: dict[str, int] = {}
    for k, c in enumerate(chunks):
        for cr in c.profiles["cruise"].dropna():
            assert seen.setdefault(cr, k) == k, f"cruise {cr} split (max_levels={max_levels})"
    if max_levels == 1:  # every allowed boundary is used: A | B C B | D | - | - | E
        assert [c.n_profiles for c in chunks] == [3, 3, 1, 1, 1, 2]
    plain = list(b.iter_chunks(max_levels, keep_cruises=False))
    assert all(c.n_levels <= max(max_levels, 3) + 2 for c in plain)  # about max_levels


def test_validation_errors():
    t = _table()
    b = ProfileBatch.from_levels(t)
    with pytest.raises(InvalidProfileError, match="length"):
        ProfileBatch(offsets=b.offsets, pressure=b.pressure[:-1], temperature=b.temperature,
                     salinity=b.salinity, profiles=b.profiles)
    with pytest.raises(InvalidProfileError, match="offsets"):
        ProfileBatch(offsets=np.array([0, 3, 2, 6]), pressure=b.pressure,
                     temperature=b.temperature, salinity=b.salinity, profiles=b.profiles)
    with pytest.raises(InvalidProfileError, match="units"):
        ProfileBatch(offsets=b.offsets, pressure=b.pressure, temperature=b.temperature,
                     salinity=b.salinity, profiles=b.profiles,
                     units={"pressure": "Pa", "temperature": "degC (ITS-90)",
                            "salinity": "PSS-78"})
    with pytest.raises(InvalidProfileError, match="numeric"):
        ProfileBatch(offsets=b.offsets, pressure=np.array(["a"] * 6), temperature=b.temperature,
                     salinity=b.salinity, profiles=b.profiles)
    t["tflag"] = np.int8(6)  # Argo code 6 is not used
    with pytest.raises(Exception, match="not in the Argo"):
        ProfileBatch.from_levels(t, flags={"temperature": "tflag"})
