"""The hand-written safetensors writer (scripts/st_write.py) against the
`safetensors` package from PyPI and, for bf16, against torch from PyPI."""

import os
import sys

import numpy as np
import pytest

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
import st_write  # noqa: E402

safetensors_numpy = pytest.importorskip("safetensors.numpy")


def test_round_trip_against_safetensors_package(tmp_path):
    rng = np.random.default_rng(1)
    x = rng.normal(size=(3, 5, 7)) * 10
    tensors = {
        "a32": ("F32", x),
        "a16": ("F16", x),
        "i32": ("I32", np.arange(12).reshape(3, 4) - 5),
        "i64": ("I64", np.arange(6) * 10**12),
        "u8": ("U8", np.arange(10) % 256),
        "b": ("BOOL", np.array([1, 0, 1, 1], dtype=bool)),
    }
    p = tmp_path / "t.safetensors"
    st_write.write(p, tensors, metadata={"model": "Wren-7"})
    # safetensors.numpy.load_file (PyPI `safetensors`) parses our bytes.
    got = safetensors_numpy.load_file(str(p))
    np.testing.assert_array_equal(got["a32"], x.astype(np.float32))
    np.testing.assert_array_equal(got["a16"], x.astype(np.float32).astype(np.float16))
    np.testing.assert_array_equal(got["i32"], tensors["i32"][1])
    np.testing.assert_array_equal(got["i64"], tensors["i64"][1])
    np.testing.assert_array_equal(got["u8"], tensors["u8"][1])
    np.testing.assert_array_equal(got["b"], tensors["b"][1])
    assert got["b"].dtype == np.bool_
    # our reader agrees with the package
    mine = st_write.read(p)
    for k in got:
        np.testing.assert_array_equal(mine[k].values, got[k].astype(mine[k].values.dtype))
    assert mine["__metadata__"] == {"model": "Wren-7"}


def test_writer_output_equals_package_output(tmp_path):
    # The package writes the same layout; file bytes can differ only in
    # header key order / padding, so compare the parsed content instead.
    rng = np.random.default_rng(2)
    x = rng.normal(size=(4, 9)).astype(np.float32)
    ref = tmp_path / "pkg.safetensors"
    safetensors_numpy.save_file({"logits": x}, str(ref))
    mine = st_write.read(ref)
    np.testing.assert_array_equal(mine["logits"].values, x.astype(np.float64))
    assert mine["logits"].dtype == "F32"


def test_bf16_against_torch(tmp_path):
    torch = pytest.importorskip("torch")
    st_torch = pytest.importorskip("safetensors.torch")
    rng = np.random.default_rng(3)
    x = np.concatenate(
        [rng.normal(size=2000) * 30, [0.0, -0.0, np.inf, -np.inf, 1e-40, 3.0e38, 1.00390625, 1.01171875]]
    ).astype(np.float32)
    # torch's float32 -> bfloat16 cast rounds to nearest even (PyPI torch).
    want = torch.from_numpy(x).to(torch.bfloat16)
    np.testing.assert_array_equal(
        st_write.stored_f64(x, "BF16"), want.to(torch.float64).numpy()
    )
    p = tmp_path / "bf.safetensors"
    st_write.write(p, {"logits": ("BF16", x.reshape(-1, 8))})
    got = st_torch.load_file(str(p))["logits"]
    assert got.dtype == torch.bfloat16
    assert torch.equal(got.reshape(-1), want)


def test_bf16_rounding_worked_examples():
    # Worked by hand from the binary32 layout: 1 + 2^-8 lies halfway between
    # the bf16 neighbours 1 and 1 + 2^-7 and rounds to the even one (1.0);
    # 1 + 3*2^-8 is halfway between 1 + 2^-7 and 1 + 2^-6 and rounds to 1 + 2^-6.
    got = st_write.stored_f64(np.array([1 + 2**-8, 1 + 3 * 2**-8, 1 + 2**-8 + 2**-20]), "BF16")
    np.testing.assert_array_equal(got, [1.0, 1 + 2**-6, 1 + 2**-7])
    assert np.isnan(st_write.stored_f64(np.array([np.nan]), "BF16")[0])
