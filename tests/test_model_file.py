"""Tests for decoder.encoding.model_file: the versioned .npz container of a place model.

The files are checked with general-purpose readers outside the project:
numpy.load (allow_pickle=False) and the standard library's zipfile and json.
Headers and arrays are invented for the test.
"""

import json
import zipfile

import numpy as np
import pytest

from decoder.encoding.model_file import (
    FORMAT_NAME,
    FORMAT_VERSION,
    ModelFileError,
    read_model_file,
    write_model_file,
)


def parts(header, arrays):
    return header, arrays


def test_a_written_file_is_a_plain_npz_that_reads_back_exactly(tmp_path):
    path = tmp_path / "model.npz"
    arrays = {"counts": np.arange(12, dtype=np.int32).reshape(3, 4), "xy_cm": np.array([[1.5, np.nan]])}
    header = {"settings": {"bin_cm": np.float64(2.5), "ids": np.array([3, 7])}, "n": np.int64(2)}
    assert write_model_file(path, header, arrays) == path
    # numpy's own reader, without pickle, and the standard library's zip reader.
    assert zipfile.is_zipfile(path)
    with np.load(path, allow_pickle=False) as npz:
        assert sorted(npz.files) == ["counts", "header", "xy_cm"]
        stored = json.loads(str(npz["header"][()]))
    assert list(stored)[:2] == ["format", "version"]
    assert stored == {"format": FORMAT_NAME, "version": FORMAT_VERSION,
                      "settings": {"bin_cm": 2.5, "ids": [3, 7]}, "n": 2}
    got_header, got_arrays = read_model_file(path, parts)
    assert got_header == stored
    for name, value in arrays.items():
        np.testing.assert_array_equal(got_arrays[name], value)
        assert got_arrays[name].dtype == value.dtype
    assert not list(tmp_path.glob("*.partial"))


def test_a_header_value_json_cannot_hold_is_refused(tmp_path):
    with pytest.raises(TypeError, match="cannot write object into a model file header"):
        write_model_file(tmp_path / "m.npz", {"bad": object()}, {})


@pytest.mark.parametrize(
    "make, message",
    [
        (lambda p: p.write_bytes(b"rate maps\n"), "not an .npz archive"),
        (lambda p: np.savez(p, counts=np.zeros(3)), "no header"),
        (lambda p: np.savez(p, header=np.array(json.dumps({"format": "another"}))), "not a placeloop place-model"),
        (lambda p: np.savez(p, header=np.array(json.dumps({"format": FORMAT_NAME, "version": 99}))),
         "format version 99"),
    ],
)
def test_a_file_that_is_not_a_model_of_this_version_says_so(tmp_path, make, message):
    path = tmp_path / "model.npz"
    make(path)
    with pytest.raises(ModelFileError, match=message):
        read_model_file(path, parts)


def test_a_truncated_file_or_parts_that_do_not_fit_read_as_damaged(tmp_path):
    path = tmp_path / "model.npz"
    write_model_file(path, {"n": 1}, {"counts": np.arange(10_000.0)})
    whole = path.read_bytes()
    path.write_bytes(whole[: len(whole) // 2])
    with pytest.raises(ModelFileError, match="truncated or damaged"):
        read_model_file(path, parts)
    path.write_bytes(whole)

    def build(header, arrays):
        raise ValueError("the accumulated arrays do not match the header")

    with pytest.raises(ModelFileError, match="truncated or damaged .*do not match"):
        read_model_file(path, build)
