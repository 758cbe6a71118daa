"""The KL divergence that storing logits in bf16 / f16 causes by rounding alone.

A direct numpy simulation (float64 KL of each row against its own rounded
copy) is compared with the first-order prediction of scripts/floor_model.py:

    KL(p||q) ~= 1/2 Var_p(d)                (second-order expansion of KL;
                                             common practice)
    rounding to spacing s: Var(e) = s^2/12  (uniform quantisation noise;
                                             common practice)
    => floor ~= 1/2 * sum_i p_i (1 - p_i) s_i^2 / 12

Synthetic rows: logits ~ N(0, 3) over a 32k vocabulary, shifted so that the
row maximum lies in [25, 26) (typical raw magnitudes of language-model logits,
from memory).
"""
from __future__ import annotations

import json
import subprocess

import numpy as np
import pytest
import torch

import floor_model as fm

VOCAB = 32768
ROWS = 48


@pytest.fixture(scope="module")
def rows() -> np.ndarray:
    rng = np.random.default_rng(2024)
    z = rng.normal(0.0, 3.0, size=(ROWS, VOCAB))
    # row maximum in [25, 26), drawn per row so that the top token's rounding
    # error is not the same in every row
    return z - z.max(axis=1, keepdims=True) + 25.0 + rng.uniform(0, 1, size=(ROWS, 1))


def test_numpy_bf16_rounding_matches_torch():
    """The bit-level round-to-nearest-even of floor_model agrees with torch's
    float32 -> bfloat16 conversion (external reference: torch)."""
    x = np.random.default_rng(5).normal(0, 40, 200_000)
    want = torch.tensor(x, dtype=torch.float32).to(torch.bfloat16).double().numpy()
    np.testing.assert_array_equal(fm.round_to_bf16(x), want)


def test_rounding_step_matches_numpy_spacing():
    """Spacing of floor_model vs numpy.spacing for f16 and f32 (external:
    numpy); bf16 spacing is 2^16 times the f32 spacing (16 fewer significand bits)."""
    # values taken already representable, so that rounding cannot carry one
    # into the next binade before numpy measures its spacing
    x = np.abs(np.random.default_rng(6).normal(0, 30, 10_000)) + 1e-3
    h = x.astype(np.float16)
    np.testing.assert_array_equal(fm.rounding_step(h.astype(np.float64), "f16"),
                                  np.spacing(h).astype(np.float64))
    f = x.astype(np.float32)
    np.testing.assert_array_equal(fm.rounding_step(f.astype(np.float64), "f32"),
                                  np.spacing(f).astype(np.float64))
    b = fm.round_to_bf16(x)
    np.testing.assert_array_equal(fm.rounding_step(b, "bf16"),
                                  np.spacing(b.astype(np.float32)).astype(np.float64) * 2.0 ** 16)


@pytest.mark.parametrize("dtype", ["bf16", "f16"])
@pytest.mark.parametrize("form", ["raw", "centered", "logprobs"])
def test_simulated_floor_agrees_with_first_order_prediction(rows, dtype, form):
    """Measured mean KL vs 1/2 sum p(1-p) s^2/12: within a factor of 2."""
    measured = fm.measured_floor(rows, dtype, form)
    predicted = fm.predicted_floor(rows, dtype, form)
    print(f"{dtype:5s} {form:9s} measured {measured:.3e} nats, predicted {predicted:.3e}, "
          f"ratio {measured / predicted:.3f}")
    assert 0.5 < measured / predicted < 2.0


def test_raw_bf16_costs_about_a_millinat_and_centering_far_less(rows):
    raw = fm.measured_floor(rows, "bf16", "raw")
    centered = fm.measured_floor(rows, "bf16", "centered")
    raw16 = fm.measured_floor(rows, "f16", "raw")
    centered16 = fm.measured_floor(rows, "f16", "centered")
    print(f"bf16 raw {raw:.3e}, bf16 centered {centered:.3e}, "
          f"f16 raw {raw16:.3e}, f16 centered {centered16:.3e} nats")
    # raw bf16 at magnitude ~25: spacing 1/8, s^2/12 = 1.3e-3, times 1/2 and
    # the spread factor sum p(1-p) (~0.8 here) -> ~5e-4 .. 1e-3 nats
    assert 3e-4 < raw < 3e-3
    assert centered < raw / 10
    assert raw16 < raw / 30 and centered16 < raw16 / 10


def test_floor_is_zero_for_exact_values():
    """Integer logits are exact in every type: nothing to round, floor 0."""
    z = np.arange(-20.0, 12.0).reshape(1, -1)
    assert fm.predicted_floor(z, "bf16", "raw") == 0.0
    assert fm.measured_floor(z, "bf16", "raw") == 0.0


def test_klgauge_storage_floor_against_prediction(klgauge_bin, tmp_path):
    """`klgauge compare` of f32 raw rows against their own bf16 rounding:
    kl.mean must equal the numpy KL (rel 1e-4) and `storage_floor` must be a
    number within a factor of 2 of the predicted floor (reference stored in
    f32, candidate in bf16, raw form)."""
    from safetensors.torch import save_file

    rng = np.random.default_rng(77)
    z = rng.normal(0.0, 3.0, size=(16, VOCAB))
    z = z - z.max(axis=1, keepdims=True) + 25.0 + rng.uniform(0, 1, size=(16, 1))
    z = z.astype(np.float32).astype(np.float64)
    zq = fm.round_to_bf16(z)
    ref, cand = tmp_path / "ref.safetensors", tmp_path / "cand.safetensors"
    save_file({"logits": torch.from_numpy(z.astype(np.float32))}, str(ref),
              metadata={"model": "Wren-7 synthetic rows", "logits_form": "raw"})
    save_file({"logits": torch.from_numpy(z.astype(np.float32)).to(torch.bfloat16)}, str(cand),
              metadata={"model": "Wren-7 synthetic rows, bf16", "logits_form": "raw"})
    report = tmp_path / "report.json"
    r = subprocess.run([klgauge_bin, "compare", str(ref), str(cand), "--json", str(report)],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    c = json.loads(report.read_text())["candidates"][0]
    measured = float(np.mean(fm.kl_rows(z, zq)))
    assert c["kl"]["mean"] == pytest.approx(measured, rel=1e-4)
    floor = c["storage_floor"]
    assert isinstance(floor, (int, float)) and not isinstance(floor, bool), \
        f"storage_floor should be a number, got {floor!r}"
    predicted = fm.predicted_floor(z, "bf16", "raw", ref_dtype="f32")
    print(f"klgauge storage_floor {floor:.3e}, predicted {predicted:.3e}, measured {measured:.3e}")
    assert 0.5 < floor / predicted < 2.0


def test_command_line_reports_the_floor_of_a_stored_file(tmp_path, capsys):
    """`floor_model.py FILE` takes the stored bf16 values as the true ones:
    its number is the prediction for those rows with only exact zeros free."""
    from safetensors.torch import save_file

    z = np.random.default_rng(9).normal(0, 3, size=(8, 4096))
    z = z - z.max(axis=1, keepdims=True)
    stored = fm.round_to_bf16(z)
    path = tmp_path / "rows.safetensors"
    save_file({"logits": torch.from_numpy(z.astype(np.float32)).to(torch.bfloat16)}, str(path))
    assert fm._main([str(path)]) == 0
    out = capsys.readouterr().out
    want = fm.predicted_floor(stored, "bf16", "raw", exact_is_free=False)
    assert out.startswith("8 rows") and f"{want:.3e}" in out
    assert fm._main([str(tmp_path / "missing.safetensors")]) == 2
