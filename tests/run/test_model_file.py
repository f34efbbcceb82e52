"""The state container: exact round trips, and every kind of damage caught with a clear message.

Outside references: numpy's own dtype and memory-order semantics (np.isfortran,
tobytes) judge the round trips; SHA-256 is FIPS 180-4 as implemented by hashlib; file
damage (truncation, flipped bits, appended bytes) is the common-practice threat model for
checkpoint files.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import tempfile
import tracemalloc
import zipfile

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from stream.errors import EXIT_INPUT, ModelFileError
import stream.run.atomic as atomic
import stream.run.model_file as model_file
from stream.run.model_file import (describe_model_file, json_problem, read_model_file,
                                   write_model_file)

DTYPES = ["bool", "int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64",
          "float16", "float32", "float64", "complex64", "complex128"]
SHAPES = [(), (0,), (7,), (3, 4), (2, 0, 3), (2, 3, 4)]


def _random_array(rng: np.random.Generator, dtype: str, shape: tuple) -> np.ndarray:
    if dtype == "bool":
        return np.asarray(rng.random(shape) < 0.5)
    # Random bit patterns: includes NaNs with payloads, infinities, -0.0, subnormals.
    itemsize = np.dtype(dtype).itemsize
    raw = rng.integers(0, 256, size=int(np.prod(shape)) * itemsize, dtype=np.uint8)
    return raw.view(dtype).reshape(shape)


def _same(a: np.ndarray, b: np.ndarray) -> bool:
    """Bit-for-bit equal, same dtype and shape (NaN payloads and -0.0 included)."""
    return a.dtype == b.dtype and a.shape == b.shape and a.tobytes() == b.tobytes()


def _sample(path) -> dict:
    arrays = {
        "counts": np.arange(12, dtype=np.int64).reshape(3, 4),
        "means": np.asfortranarray(np.linspace(-1.0, 1.0, 6).reshape(2, 3)),
        "active": np.array([True, False, True]),
        "empty": np.zeros((0, 2), dtype=np.float32),
        "scalar": np.array(2.5),
    }
    write_model_file(path, "classifier", {"grace_period": 200, "delta": 1e-7}, arrays)
    return arrays


def _data_start(blob: bytes) -> int:
    """Offset of the first array byte: after the third line break."""
    position = 0
    for _ in range(3):
        position = blob.index(b"\n", position) + 1
    return position


def _craft(path, manifest: dict, data: bytes = b"", version: int = 1) -> None:
    """Write a file by hand with a correct manifest checksum (to reach the deeper checks)."""
    text = json.dumps(manifest).encode()
    header = f"version {version} manifest {len(text)} sha256 {hashlib.sha256(text).hexdigest()}\n"
    with open(path, "wb") as out:
        out.write(model_file.MAGIC + header.encode() + text + b"\n" + data)


# -- round trips -------------------------------------------------------------------------

@pytest.mark.parametrize("dtype", DTYPES)
def test_every_dtype_and_shape_round_trips_exactly(tmp_path, dtype):
    rng = np.random.default_rng(7)
    arrays = {f"a{i}": _random_array(rng, dtype, shape) for i, shape in enumerate(SHAPES)}
    path = tmp_path / "m.sap"
    write_model_file(path, "k", {}, arrays)
    _, back = read_model_file(path)
    assert list(back) == list(arrays)
    for name in arrays:
        assert _same(arrays[name], back[name]), name


def test_fortran_order_is_kept_and_values_agree(tmp_path):
    original = np.asfortranarray(np.arange(24, dtype=np.float64).reshape(2, 3, 4))
    write_model_file(tmp_path / "m.sap", "k", {}, {"f": original})
    _, back = read_model_file(tmp_path / "m.sap")
    assert np.isfortran(back["f"])
    assert np.array_equal(back["f"], original)
    assert describe_model_file(tmp_path / "m.sap")["arrays"]["f"]["order"] == "F"


def test_strided_big_endian_and_scalar_inputs_come_back_equal(tmp_path):
    base = np.arange(40, dtype=np.int32).reshape(5, 8)
    strided = base[::2, 1::3]
    big = np.arange(5, dtype=">f8") / 3
    write_model_file(tmp_path / "m.sap", "k", {},
                     {"strided": strided, "big": big, "scalar": np.float32(1.5)})
    _, back = read_model_file(tmp_path / "m.sap")
    assert back["scalar"].shape == () and back["scalar"].dtype == np.float32  # stored 0-d
    assert np.array_equal(back["strided"], strided) and back["strided"].flags.c_contiguous
    assert np.array_equal(back["big"], big) and back["big"].dtype.isnative


def test_arrays_read_back_are_writable_and_independent(tmp_path):
    _sample(tmp_path / "m.sap")
    _, back = read_model_file(tmp_path / "m.sap")
    back["counts"][0, 0] = -5
    back["means"][:] = 0.0
    _, again = read_model_file(tmp_path / "m.sap")
    assert again["counts"][0, 0] == 0 and again["means"][1, 2] == 1.0


@settings(max_examples=60, deadline=None)
@given(hnp.arrays(dtype=st.sampled_from(DTYPES).map(np.dtype),
                  shape=hnp.array_shapes(min_dims=0, max_dims=3, min_side=0, max_side=5)),
       st.booleans())
def test_round_trip_property(array, fortran):
    if fortran:
        array = np.asfortranarray(array)
    with tempfile.TemporaryDirectory() as directory:
        path = os.path.join(directory, "m.sap")
        write_model_file(path, "k", {"n": 1}, {"x": array})
        _, back = read_model_file(path)
    assert _same(array, back["x"])
    assert np.isfortran(back["x"]) == np.isfortran(array)


def test_meta_round_trips(tmp_path):
    meta = {
        "settings": {"grace_period": 200, "delta": 1e-7, "tie_threshold": 0.05,
                     "criterion": "info_gain", "leaf": None, "strict": False},
        "features": ["supply_temp", "Druck \u00fcber Soll", "\u6e29\u5ea6"],
        "position": {"file": "/var/log/plant/feed.csv", "offset": 2**40 + 3},
        "huge": 2**70, "tiny": 5e-324, "nested": [[1, [2.5, {"x": []}]], {}],
    }
    write_model_file(tmp_path / "m.sap", "classifier", meta, {})
    back, arrays = read_model_file(tmp_path / "m.sap", expect_kind="classifier")
    assert back == meta and arrays == {}
    assert list(back["settings"]) == list(meta["settings"])  # key order too


def test_same_state_gives_identical_bytes(tmp_path):
    _sample(tmp_path / "a.sap")
    _sample(tmp_path / "b.sap")
    assert (tmp_path / "a.sap").read_bytes() == (tmp_path / "b.sap").read_bytes()


def test_first_three_lines_are_text(tmp_path):
    _sample(tmp_path / "m.sap")
    with open(tmp_path / "m.sap", "rb") as handle:
        lines = [handle.readline() for _ in range(3)]
    assert lines[0] == b"SAPWOOD-STATE\n"
    assert lines[1].startswith(b"version 1 manifest ")
    manifest = json.loads(lines[2])
    assert manifest["kind"] == "classifier"
    assert [a["name"] for a in manifest["arrays"]] == ["counts", "means", "active", "empty",
                                                       "scalar"]


def test_describe_summarises_without_reading_arrays(tmp_path):
    path = tmp_path / "m.sap"
    _sample(path)
    summary = describe_model_file(path)
    assert summary["kind"] == "classifier" and summary["version"] == 1
    assert summary["meta"] == {"grace_period": 200, "delta": 1e-7}
    assert summary["bytes"] == path.stat().st_size
    assert summary["arrays"]["counts"] == {"dtype": "int64", "shape": (3, 4), "order": "C",
                                           "nbytes": 96}
    # Damage an array byte: describe does not look at array bytes, reading does.
    blob = bytearray(path.read_bytes())
    blob[-1] ^= 0xFF
    path.write_bytes(bytes(blob))
    assert describe_model_file(path)["kind"] == "classifier"
    with pytest.raises(ModelFileError, match="checksum of array 'scalar' does not match"):
        read_model_file(path)


# -- damage -------------------------------------------------------------------------------

def test_every_truncation_is_detected(tmp_path):
    cut = tmp_path / "cut.sap"
    _sample(cut)
    # Shrink the same file step by step (rewriting it whole each time is slow on ext4).
    for length in range(cut.stat().st_size - 1, -1, -1):
        os.truncate(cut, length)
        for reader in (read_model_file, describe_model_file):
            with pytest.raises(ModelFileError, match=r"^'.*cut\.sap' is truncated: "):
                reader(cut)


def test_appended_bytes_are_detected(tmp_path):
    path = tmp_path / "m.sap"
    _sample(path)
    with open(path, "ab") as out:
        out.write(b"\x00\x00")
    with pytest.raises(ModelFileError, match="is corrupt: 2 unexpected bytes follow the last array"):
        read_model_file(path)


def _each_flip(path, positions, masks):
    """Flip one byte in place, yield, restore it: the file is never rewritten whole."""
    with open(path, "r+b") as handle:
        for position in positions:
            handle.seek(position)
            original = handle.read(1)[0]
            for mask in masks:
                handle.seek(position)
                handle.write(bytes([original ^ mask]))
                handle.flush()
                yield position
            handle.seek(position)
            handle.write(bytes([original]))
            handle.flush()


def test_flipped_byte_in_array_section_names_the_array(tmp_path):
    path = tmp_path / "m.sap"
    arrays = _sample(path)
    blob = path.read_bytes()
    start = _data_start(blob)
    owners = [name for name, a in arrays.items() for _ in range(a.nbytes)]
    assert len(blob) - start == len(owners)
    for position in _each_flip(path, range(start, len(blob)), (0x01, 0x80, 0xFF)):
        expected = (f"'{path}' is corrupt: checksum of array "
                    f"'{owners[position - start]}' does not match")
        with pytest.raises(ModelFileError) as caught:
            read_model_file(path)
        assert str(caught.value) == expected
    assert path.read_bytes() == blob


def test_flipped_byte_anywhere_is_detected(tmp_path):
    path = tmp_path / "m.sap"
    _sample(path)
    size = path.stat().st_size
    for _ in _each_flip(path, range(size), (0x01, 0x20, 0x80, 0xFF)):
        with pytest.raises(ModelFileError, match=r"^'.*m\.sap' "):
            read_model_file(path)
    assert read_model_file(path)[0]["grace_period"] == 200


def test_manifest_damage_is_reported_as_checksum(tmp_path):
    path = tmp_path / "m.sap"
    _sample(path)
    blob = path.read_bytes()
    position = blob.index(b'"grace_period":200') + len(b'"grace_period":2')
    path.write_bytes(blob[:position] + b"1" + blob[position + 1:])  # 200 -> 210
    with pytest.raises(ModelFileError, match="is corrupt: checksum of the manifest does not match"):
        read_model_file(path)


@pytest.mark.parametrize("foreign", ["npy", "zip", "json", "text", "binary"])
def test_foreign_files_are_refused(tmp_path, foreign):
    path = tmp_path / "other.bin"
    if foreign == "npy":
        np.save(path.open("wb"), np.arange(3))
    elif foreign == "zip":
        buffer = io.BytesIO()
        with zipfile.ZipFile(buffer, "w") as archive:
            archive.writestr("a.txt", "x")
        path.write_bytes(buffer.getvalue())
    elif foreign == "json":
        path.write_text('{"kind": "classifier"}')
    elif foreign == "text":
        path.write_text("timestamp,supply_temp\n")
    else:
        path.write_bytes(bytes(range(256)))
    with pytest.raises(ModelFileError,
                       match=r"is not a sapwood state file \(it does not begin with 'SAPWOOD-STATE'\)"):
        read_model_file(path)


def test_wrong_kind_is_refused(tmp_path):
    _sample(tmp_path / "m.sap")
    with pytest.raises(ModelFileError) as caught:
        read_model_file(tmp_path / "m.sap", expect_kind="regressor")
    assert str(caught.value) == (f"'{tmp_path / 'm.sap'}' holds a 'classifier' state, "
                                 f"expected 'regressor'")
    assert caught.value.exit_code == EXIT_INPUT


def test_future_version_is_refused(tmp_path):
    path = tmp_path / "m.sap"
    _sample(path)
    path.write_bytes(path.read_bytes().replace(b"version 1 ", b"version 7 ", 1))
    with pytest.raises(ModelFileError, match=r"was written by a newer sapwood \(format version "
                                             r"7; this one reads up to 1\); read it with a "
                                             "newer sapwood"):
        read_model_file(path)
    with pytest.raises(ModelFileError, match="format version 7"):
        describe_model_file(path)


def test_upgrade_hook_is_applied_to_older_versions(tmp_path, monkeypatch):
    path = tmp_path / "m.sap"
    _sample(path)  # written as version 1

    def one_to_two(manifest: dict) -> dict:
        manifest["meta"]["upgraded_from"] = 1
        return manifest

    monkeypatch.setattr(model_file, "FORMAT_VERSION", 2)
    with pytest.raises(ModelFileError, match="format version 1, which this sapwood no longer reads"):
        read_model_file(path)
    monkeypatch.setattr(model_file, "_MANIFEST_UPGRADES", {1: one_to_two})
    meta, arrays = read_model_file(path)
    assert meta["upgraded_from"] == 1 and arrays["counts"][2, 3] == 11
    assert describe_model_file(path)["version"] == 1


def test_missing_and_directory_paths(tmp_path):
    with pytest.raises(ModelFileError, match=r"'.*nothing\.sap' does not exist"):
        read_model_file(tmp_path / "nothing.sap")
    with pytest.raises(ModelFileError, match="is a directory"):
        describe_model_file(tmp_path)


def test_huge_claims_are_refused_before_allocating(tmp_path):
    path = tmp_path / "liar.sap"
    # 8 TB claimed by a manifest whose own checksum is correct.
    huge = {"name": "x", "dtype": "float64", "shape": [10**12], "order": "C", "offset": 0,
            "nbytes": 8 * 10**12, "sha256": "0" * 64}
    _craft(path, {"kind": "k", "meta": {}, "arrays": [huge]}, b"\x00" * 64)
    tracemalloc.start()
    try:
        with pytest.raises(ModelFileError, match="is truncated: the arrays need 8000000000000 bytes"):
            read_model_file(path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak < 256 * 1024

    # A header claiming a gigantic manifest.
    path.write_bytes(model_file.MAGIC + b"version 1 manifest 999999999999999 sha256 "
                     + b"0" * 64 + b"\n{}")
    with pytest.raises(ModelFileError, match="is truncated: the manifest needs"):
        read_model_file(path)


def test_reading_allocates_no_more_than_the_file(tmp_path):
    path = tmp_path / "big.sap"
    rng = np.random.default_rng(3)
    write_model_file(path, "k", {}, {"a": rng.random(400_000), "b": rng.random((300, 500)).T})
    size = path.stat().st_size
    tracemalloc.start()
    try:
        _, arrays = read_model_file(path)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert peak <= size + 64 * 1024, (peak, size)
    assert arrays["b"].shape == (500, 300)


@pytest.mark.parametrize("entry_change, message", [
    ({"shape": [3, 5]}, r"array 'x': shape \[3, 5\] of int64 needs 120 bytes, the manifest says 96"),
    ({"shape": [3, -4], "nbytes": 96}, r"array 'x' has an invalid shape \[3, -4\]"),
    ({"shape": [True, 4]}, r"array 'x' has an invalid shape"),
    ({"dtype": "object"}, r"array 'x' has unknown dtype 'object'"),
    ({"order": "K"}, r"array 'x' has an invalid order 'K'"),
    ({"offset": 8}, r"array 'x' starts at 8, expected 0"),
    ({"sha256": "xyz"}, r"array 'x' has no valid checksum"),
])
def test_inconsistent_manifest_entries_are_corrupt(tmp_path, entry_change, message):
    data = np.arange(12, dtype=np.int64).tobytes()
    entry = {"name": "x", "dtype": "int64", "shape": [3, 4], "order": "C", "offset": 0,
             "nbytes": 96, "sha256": hashlib.sha256(data).hexdigest()}
    _craft(tmp_path / "m.sap", {"kind": "k", "meta": {}, "arrays": [entry]}, data)
    assert read_model_file(tmp_path / "m.sap")[1]["x"][2, 3] == 11  # the crafted base is valid
    _craft(tmp_path / "m.sap", {"kind": "k", "meta": {}, "arrays": [{**entry, **entry_change}]},
           data)
    with pytest.raises(ModelFileError, match="is corrupt: " + message):
        read_model_file(tmp_path / "m.sap")


# -- refusals on writing --------------------------------------------------------------------

@pytest.mark.parametrize("value, message", [
    (np.array([{"a": 1}, None], dtype=object),
     "array 'bad' has dtype object; only bool, integer, float and complex arrays can be "
     "stored (object arrays would need pickle, which sapwood never uses)"),
    (np.array(["pump", "fan"]), "array 'bad' has dtype <U4"),
    (np.array(["2024-01-01"], dtype="datetime64[D]"), "array 'bad' has dtype datetime64"),
    (np.zeros(2, dtype=[("a", "f8")]), "array 'bad' has dtype"),
    (np.ma.masked_array([1, 2], mask=[0, 1]),
     "array 'bad' is a MaskedArray, not a plain numpy array"),
    ([1, 2, 3], "array 'bad' is a list, not a plain numpy array"),
])
def test_unstorable_arrays_are_refused_and_nothing_changes(tmp_path, value, message):
    path = tmp_path / "m.sap"
    _sample(path)
    before = path.read_bytes()
    with pytest.raises(ModelFileError) as caught:
        write_model_file(path, "k", {}, {"ok": np.zeros(2), "bad": value})
    assert str(caught.value).startswith(f"cannot write '{path}': {message}")
    assert path.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["m.sap"]


@pytest.mark.skipif(np.dtype(np.longdouble).itemsize == 8, reason="long double is float64 here")
def test_extended_precision_is_refused(tmp_path):
    with pytest.raises(ModelFileError, match="extended precision"):
        write_model_file(tmp_path / "m.sap", "k", {}, {"x": np.zeros(2, dtype=np.longdouble)})


@pytest.mark.parametrize("meta, message", [
    ({"kappa": float("nan")}, "meta['kappa'] is nan; JSON has no NaN or infinity"),
    ({"a": {"b": float("inf")}}, "meta['a']['b'] is inf"),
    ({"split": ("x", 1.5)}, "meta['split'] is a tuple, which would be read back as a list"),
    ({1: "a"}, "meta has key 1; JSON keys must be strings"),
    ({"n": np.int64(3)}, "meta['n'] is of type int64, which JSON cannot hold"),
    ({"s": {1, 2}}, "meta['s'] is of type set"),
])
def test_meta_that_would_not_round_trip_is_refused(tmp_path, meta, message):
    with pytest.raises(ModelFileError) as caught:
        write_model_file(tmp_path / "m.sap", "k", meta, {})
    assert str(caught.value).startswith(f"cannot write '{tmp_path / 'm.sap'}': {message}")
    assert os.listdir(tmp_path) == []


def test_bad_names_and_kind_are_refused(tmp_path):
    with pytest.raises(ModelFileError, match="array names must be non-empty strings, got 3"):
        write_model_file(tmp_path / "m.sap", "k", {}, {3: np.zeros(1)})
    with pytest.raises(ModelFileError, match="kind must be a non-empty string, got ''"):
        write_model_file(tmp_path / "m.sap", "", {}, {})
    assert os.listdir(tmp_path) == []


def test_failed_write_keeps_old_file_and_leaves_no_temp(tmp_path, monkeypatch):
    path = tmp_path / "m.sap"
    _sample(path)
    before = path.read_bytes()

    def full_disk(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(atomic.os, "fsync", full_disk)
    with pytest.raises(OSError):
        write_model_file(path, "classifier", {"other": True}, {"x": np.ones(1000)})
    monkeypatch.undo()
    assert path.read_bytes() == before
    assert sorted(os.listdir(tmp_path)) == ["m.sap"]
    assert read_model_file(path)[0] == {"grace_period": 200, "delta": 1e-7}


def test_json_problem_accepts_plain_json_values():
    assert json_problem({"a": [1, 2.5, None, True, "x", {"b": []}]}, "v", exact=True) is None
    assert json_problem({"a": (1, 2)}, "v") is None  # tuples are fine where lists are meant
