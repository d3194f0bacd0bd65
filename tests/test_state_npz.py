"""The state's archive writer (mixture.serialize.npz_bytes) against numpy's own np.savez.

The reference is numpy: every member of the archive must hold the same bytes as the member
np.savez writes for the same array (the .npy format of numpy.lib.format), np.load must read
back the same arrays, and Python's zipfile must find the archive sound (``testzip``).
"""

from __future__ import annotations

import io
import zipfile

import numpy as np
import pytest

from mixture.serialize import npz_bytes


def _savez(arrays: dict[str, np.ndarray]) -> bytes:
    buffer = io.BytesIO()
    np.savez(buffer, allow_pickle=False, **arrays)
    return buffer.getvalue()


def _arrays() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(0)
    return {
        "float": rng.normal(size=7),
        "int": np.arange(5, dtype=np.int64),
        "matrix": rng.normal(size=(3, 4)),
        "fortran": np.asfortranarray(rng.normal(size=(3, 4))),
        "fortran_3d": np.asfortranarray(rng.normal(size=(2, 3, 4))),
        "strided": rng.normal(size=(6, 5))[::2, 1::2],
        "transposed": rng.normal(size=(4, 3)).T,
        "empty": np.zeros((0, 5)),
        "empty_int": np.zeros(0, dtype=np.int64),
        "scalar": np.array(7, dtype=np.int64),
        "utf8": np.frombuffer('{"word": "café"}'.encode(), dtype=np.uint8),
        "bool": np.array([True, False, True]),
        "int32": np.arange(4, dtype=np.int32),
        "big_endian": np.arange(3, dtype=">f8"),
        "dates": np.array(["2020-01-01"], dtype="datetime64[D]"),
        "special": np.array([np.nan, -0.0, np.inf, -np.inf]),
    }


def test_members_are_the_bytes_np_savez_writes():
    arrays = _arrays()
    ours = zipfile.ZipFile(io.BytesIO(npz_bytes(arrays)))
    reference = zipfile.ZipFile(io.BytesIO(_savez(arrays)))
    assert ours.testzip() is None
    assert ours.namelist() == reference.namelist() == [f"{name}.npy" for name in arrays]
    for name in reference.namelist():
        assert ours.read(name) == reference.read(name), name


def test_np_load_reads_back_the_arrays():
    arrays = _arrays()
    with np.load(io.BytesIO(npz_bytes(arrays)), allow_pickle=False) as archive:
        assert archive.files == list(arrays)
        for name, value in arrays.items():
            loaded = archive[name]
            assert loaded.dtype == value.dtype and loaded.shape == value.shape, name
            assert loaded.tobytes() == np.ascontiguousarray(value).tobytes(), name


def test_object_arrays_are_refused_as_np_savez_refuses_them():
    arrays = {"objects": np.array([object()])}
    with pytest.raises(ValueError):
        _savez(arrays)
    with pytest.raises(ValueError):
        npz_bytes(arrays)
