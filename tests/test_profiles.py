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
