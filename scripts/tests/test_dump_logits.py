"""Checks of scripts/dump_logits.py on the tiny offline model.

External references: torch.log_softmax of the model's own forward pass, a
direct numpy re-implementation of the fake quantisation, and SPEC's layout
rules for the 2-D logit file.
"""
from __future__ import annotations

import copy
import json
import os
import subprocess
import sys

import numpy as np
import pytest
import torch

import dump_logits
from conftest import SCRIPTS, SHARD_ROWS, run_dump
from common import (bf16_half_step, concat, load_shards, log_softmax64, np_fake_quant,
                     read_jsonl)


@pytest.fixture(scope="module")
def hf(tiny_model):
    from transformers import AutoModelForCausalLM, AutoTokenizer

    tok = AutoTokenizer.from_pretrained(tiny_model, local_files_only=True)
    model = AutoModelForCausalLM.from_pretrained(tiny_model, local_files_only=True)
    model = model.to(torch.float32).eval()
    return tok, model


@pytest.fixture(scope="module")
def prompt_ids(hf, prompts_file):
    tok, _ = hf
    out = []
    for rec in read_jsonl(prompts_file):
        ids = rec["ids"] if "ids" in rec else tok(rec["text"])["input_ids"]
        out.append((list(ids), rec.get("count_from", 0)))
    return out


def forward64(model, ids) -> np.ndarray:
    with torch.inference_mode():
        return model(torch.tensor([ids])).logits[0].double().numpy()


@pytest.fixture(scope="module")
def np_quant_model(hf):
    """The tiny model with every nn.Linear weight replaced by the numpy int4 version."""
    _, model = hf
    m = copy.deepcopy(model)
    for mod in m.modules():
        if isinstance(mod, torch.nn.Linear):
            deq, _ = np_fake_quant(mod.weight.detach().numpy(), 7, 64)
            mod.weight = torch.nn.Parameter(torch.from_numpy(deq), requires_grad=False)
    return m.eval()


# ---------------------------------------------------------------- values

def test_reference_log_softmax_matches_forward(hf, prompt_ids, ref_dump):
    """f32 centered dump vs torch.log_softmax of the model's forward pass.

    Tolerance 1e-5 nats: centered f32 values below 64 in magnitude are rounded
    by at most 2^-19 (half the f32 spacing at 32..64), well under 1e-5."""
    _, model = hf
    logits, _, _, lengths = concat(ref_dump)
    assert lengths == [len(ids) for ids, _ in prompt_ids]
    row = 0
    for ids, _ in prompt_ids:
        want = torch.log_softmax(torch.from_numpy(forward64(model, ids)), dim=-1).numpy()
        got = log_softmax64(logits[row:row + len(ids)])
        np.testing.assert_allclose(got, want, rtol=0, atol=1e-5)
        row += len(ids)
    assert row == logits.shape[0]


def test_candidate_matches_numpy_fake_quant_forward(np_quant_model, prompt_ids, cand_dump):
    """bf16 int4 dump vs the forward pass of a model quantised by numpy.

    Each stored centered value may differ from the exact one by half a bf16
    step at its magnitude (bf16 keeps 7 significand bits) plus 1e-5 for f32
    arithmetic; the log-softmax then moves by at most the largest such error
    plus the shift of the normaliser, bounded by the same largest error."""
    logits, _, _, lengths = concat(cand_dump)
    assert lengths == [len(ids) for ids, _ in prompt_ids]
    row = 0
    for ids, _ in prompt_ids:
        z = forward64(np_quant_model, ids)
        centered = z - z.max(axis=-1, keepdims=True)
        got = logits[row:row + len(ids)]
        bound = bf16_half_step(centered) + 1e-5
        assert np.all(np.abs(got - centered) <= bound), np.max(np.abs(got - centered) - bound)
        err = 2 * bound.max(axis=-1, keepdims=True)
        assert np.all(np.abs(log_softmax64(got) - log_softmax64(z)) <= err)
        row += len(ids)


def test_forms_give_the_same_distribution(tiny_model, prompts_file, ref_dump, tmp_path):
    """raw, centered and logprobs dumps (f32) agree after log-softmax (1e-5)."""
    base = log_softmax64(concat(ref_dump)[0])
    for form in ("raw", "logprobs"):
        out = tmp_path / form
        run_dump(tiny_model, prompts_file, out, "--form", form, "--shard-rows", 10_000)
        logits = concat(str(out))[0]
        if form == "logprobs":
            # already normalised: exp sums to one within f32 rounding
            np.testing.assert_allclose(np.exp(logits).sum(axis=-1), 1.0, atol=1e-5)
        np.testing.assert_allclose(log_softmax64(logits), base, rtol=0, atol=1e-5)
        assert load_shards(str(out))[0]["__metadata__"]["logits_form"] == form


def test_bf16_compute_runs_and_stays_close(tiny_model, prompts_file, ref_dump, tmp_path):
    """A model run in bf16 differs from f32 only by rounding: small KL."""
    out = tmp_path / "bf16run"
    run_dump(tiny_model, prompts_file, out, "--compute-dtype", "bf16", "--dtype", "bf16")
    p = log_softmax64(concat(ref_dump)[0])
    q = log_softmax64(concat(str(out))[0])
    kl = np.sum(np.exp(p) * (p - q), axis=-1)
    assert kl.mean() < 0.05, kl.mean()
    assert load_shards(str(out))[0]["__metadata__"]["compute_dtype"] == "bf16"


# ---------------------------------------------------------------- layout

def test_targets_are_next_tokens_and_mask(prompt_ids, ref_dump, cand_dump):
    for d in (ref_dump, cand_dump):
        _, targets, mask, _ = concat(d)
        want_t, want_m = [], []
        for ids, count_from in prompt_ids:
            want_t += ids[1:] + [-1]
            want_m += [0 if i < count_from else 1 for i in range(len(ids))]
        assert targets.tolist() == want_t
        assert mask.tolist() == want_m
        assert 0 < int(mask.sum()) < len(mask)  # the preamble record left some rows out


def test_layout_follows_spec(ref_dump, cand_dump):
    """SPEC 2-D layout: logits [rows, vocab]; targets I64, mask U8 of [rows];
    prompt_offsets I64 [prompts+1] from 0 to rows, one shard = whole prompts."""
    for d, dtype in ((ref_dump, torch.float32), (cand_dump, torch.bfloat16)):
        shards = load_shards(d)
        assert [os.path.basename(s["__path__"]) for s in shards] == \
            [f"part-{i:05d}.safetensors" for i in range(len(shards))]
        assert not [f for f in os.listdir(d) if not f.endswith(".safetensors")]
        for s in shards:
            rows, vocab = s["logits"].shape
            assert s["logits"].dtype == dtype and vocab == 512
            assert s["targets"].dtype == torch.int64 and tuple(s["targets"].shape) == (rows,)
            assert s["mask"].dtype == torch.uint8 and tuple(s["mask"].shape) == (rows,)
            assert set(s["mask"].unique().tolist()) <= {0, 1}
            off = s["prompt_offsets"]
            assert off.dtype == torch.int64 and off.dim() == 1
            assert off[0] == 0 and off[-1] == rows
            assert torch.all(off[1:] > off[:-1])
            # targets -1 exactly at each prompt's last row
            last = (off[1:] - 1).tolist()
            assert torch.nonzero(s["targets"] < 0).flatten().tolist() == last


def test_shards_hold_whole_prompts_and_close_at_limit(prompt_ids, ref_dump):
    shards = load_shards(ref_dump)
    assert len(shards) > 1
    lengths = [len(ids) for ids, _ in prompt_ids]
    k = 0
    for i, s in enumerate(shards):
        local = np.diff(s["prompt_offsets"].numpy()).tolist()
        assert local == lengths[k:k + len(local)]  # whole prompts, in order
        k += len(local)
        rows = s["logits"].shape[0]
        if i < len(shards) - 1:
            assert rows >= SHARD_ROWS
        assert rows - local[-1] < SHARD_ROWS  # closed as soon as it reached the limit
    assert k == len(lengths)


def test_metadata(ref_dump, cand_dump, tiny_model):
    m = load_shards(ref_dump)[0]["__metadata__"]
    assert m["logits_form"] == "centered"
    assert m["model"] == "wren7-tiny"
    assert os.path.samefile(m["tokenizer"], os.path.join(tiny_model, "tokenizer.json"))
    assert m["fake_quant"] == "none"
    c = load_shards(cand_dump)[0]["__metadata__"]
    assert c["fake_quant"] == "int4" and c["fake_quant_group_size"] == "64"
    assert c["storage_dtype"] == "bf16"
    assert "int4" in c["model"]


# ---------------------------------------------------------------- fake quantisation

@pytest.mark.parametrize("kind,group", [("int4", 64), ("int8", 64), ("int4", 48), ("int4", 0)])
def test_fake_quant_matches_numpy_and_moves_at_most_half_a_step(hf, tiny_model, kind, group):
    """Every nn.Linear weight: the dumper's quantised model equals a direct
    numpy implementation (float32, rtol 1e-6) and each element moved by at
    most half its group's step (scale/2), as round-to-nearest must."""
    _, orig = hf
    qmax = {"int8": 127, "int4": 7}[kind]
    model, layers = dump_logits.load_model(tiny_model, "f32", "cpu", kind, group)
    q_mods = dict(model.named_modules())
    checked, changed, total = 0, 0, 0
    for name, mod in orig.named_modules():
        if not isinstance(mod, torch.nn.Linear):
            continue
        w = mod.weight.detach().numpy()
        got = q_mods[name].weight.detach().numpy()
        want, scale = np_fake_quant(w, qmax, group)
        np.testing.assert_allclose(got, want, rtol=1e-6, atol=0)
        assert np.all(np.abs(got - w) <= scale / 2 * (1 + 1e-6))
        # at most 2*qmax+1 distinct levels per group
        levels = np.round(got[:, : (group or w.shape[1])] / scale[:, : (group or w.shape[1])])
        assert np.abs(levels).max() <= qmax
        changed += int(np.sum(got != w))
        total += w.size
        checked += 1
    assert checked == layers == 15  # 7 per Llama layer x 2 + lm_head
    assert changed / total > 0.9  # rounding really changed the weights
    # embeddings and norms untouched
    np.testing.assert_array_equal(model.get_input_embeddings().weight.detach().numpy(),
                                  orig.get_input_embeddings().weight.detach().numpy())


# ---------------------------------------------------------------- bad input

def test_bad_input_is_one_message_and_exit_2(tiny_model, prompts_file, ref_dump, tmp_path):
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"text": "fine"}\n{"text": oops}\n')
    script = os.path.join(SCRIPTS, "dump_logits.py")
    cases = [
        ([tiny_model, str(bad), str(tmp_path / "o1")], f"{bad}:2"),
        ([tiny_model, str(tmp_path / "missing.jsonl"), str(tmp_path / "o2")], "missing.jsonl"),
        ([str(tmp_path / "nomodel"), prompts_file, str(tmp_path / "o3")], "nomodel"),
        ([tiny_model, prompts_file, ref_dump], "--overwrite"),
    ]
    for argv, needle in cases:
        r = subprocess.run([sys.executable, script] + argv, capture_output=True, text=True)
        assert r.returncode == 2, (argv, r.stderr)
        lines = [l for l in r.stderr.splitlines() if l.strip()]
        assert len(lines) == 1 and needle in lines[0], r.stderr
        assert "Traceback" not in r.stderr
    assert not (tmp_path / "o1").exists() or not os.listdir(tmp_path / "o1")


def test_ids_outside_vocabulary_rejected(tiny_model, tmp_path, capsys):
    p = tmp_path / "ids.jsonl"
    p.write_text(json.dumps({"ids": [1, 2, 9999]}) + "\n")
    assert dump_logits.main([tiny_model, str(p), str(tmp_path / "o")]) == 2
    err = capsys.readouterr().err
    assert "9999" in err and str(p) in err


# ---------------------------------------------------------------- sampling mode

def test_sample_mode(hf, tiny_model, prompts_file, prompt_ids, np_quant_model, tmp_path):
    """Draws reproduce without a KV cache; log-probabilities are the models'
    own log_softmax (1e-5); A against A gives identical columns."""
    from safetensors.torch import load_file

    out = tmp_path / "samples.safetensors"
    assert dump_logits.main(["sample", tiny_model, tiny_model, prompts_file, str(out),
                             "--fake-quant", "int4", "--new-tokens", "6", "--seed", "3",
                             "--no-eos-stop"]) == 0
    d = load_file(str(out))
    assert d["logprob_ref"].dtype == torch.float32 and d["logprob_cand"].dtype == torch.float32
    off = d["prompt_offsets"]
    assert off.dtype == torch.int64 and off.tolist() == [6 * i for i in range(len(prompt_ids) + 1)]
    _, model = hf
    for i, (ids, _) in enumerate(prompt_ids):
        gen = torch.Generator().manual_seed(3 * 1_000_003 + i)
        seq = list(ids)
        for _ in range(6):  # full forward each step, no cache
            probs = torch.softmax(torch.from_numpy(forward64(model, seq)[-1]), dim=-1)
            seq.append(int(torch.multinomial(probs, 1, generator=gen)))
        drawn = seq[len(ids):]
        assert d["tokens"][off[i]:off[i + 1]].tolist() == drawn
        pos = np.arange(len(ids) - 1, len(seq) - 1)
        lp_a = log_softmax64(forward64(model, seq))[pos, drawn]
        lp_b = log_softmax64(forward64(np_quant_model, seq))[pos, drawn]
        np.testing.assert_allclose(d["logprob_ref"][off[i]:off[i + 1]].numpy(), lp_a, atol=1e-5)
        np.testing.assert_allclose(d["logprob_cand"][off[i]:off[i + 1]].numpy(), lp_b, atol=1e-4)
    same = tmp_path / "same.safetensors"
    assert dump_logits.main(["sample", tiny_model, tiny_model, prompts_file, str(same),
                             "--new-tokens", "4"]) == 0
    s = load_file(str(same))
    assert torch.equal(s["logprob_ref"], s["logprob_cand"])


# ---------------------------------------------------------------- klgauge itself

def test_klgauge_compare_on_dumped_pair(klgauge_bin, ref_dump, cand_dump, tmp_path):
    """`klgauge compare` on the dumps: positions = mask-1 rows, kl.mean > 0 and
    equal (rel 1e-4) to the float64 numpy mean over counted rows."""
    report = tmp_path / "report.json"
    r = subprocess.run([klgauge_bin, "compare", ref_dump, cand_dump, "--json", str(report)],
                       capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr
    rep = json.loads(report.read_text())
    c = rep["candidates"][0]
    p_logits, _, mask, _ = concat(ref_dump)
    q_logits = concat(cand_dump)[0]
    assert c["positions"] == int(mask.sum())
    assert c["kl"]["mean"] > 0
    lp, lq = log_softmax64(p_logits), log_softmax64(q_logits)
    kl = np.sum(np.exp(lp) * (lp - lq), axis=-1)[mask == 1]
    assert c["kl"]["mean"] == pytest.approx(kl.mean(), rel=1e-4)


def require_subcommand(binary: str, name: str) -> None:
    r = subprocess.run([binary, name, "--help"], capture_output=True, text=True, timeout=60)
    if r.returncode != 0:
        pytest.skip(f"{binary} has no `{name}` command yet")


def test_klgauge_inspect_reads_a_dump_directory(klgauge_bin, cand_dump):
    """`klgauge inspect` accepts the sharded bf16 dump (exit 0); its report
    keys are not checked here."""
    require_subcommand(klgauge_bin, "inspect")
    r = subprocess.run([klgauge_bin, "inspect", cand_dump], capture_output=True, text=True, timeout=120)
    assert r.returncode == 0, r.stderr


def test_klgauge_estimate_reads_the_sample_file(klgauge_bin, tiny_model, prompts_file, tmp_path):
    """`klgauge estimate` accepts the sample-mode file (exit 0)."""
    require_subcommand(klgauge_bin, "estimate")
    samples = tmp_path / "samples.safetensors"
    assert dump_logits.main(["sample", tiny_model, tiny_model, prompts_file, str(samples),
                             "--fake-quant", "int4", "--new-tokens", "8"]) == 0
    r = subprocess.run([klgauge_bin, "estimate", str(samples)], capture_output=True, text=True,
                       timeout=120)
    assert r.returncode == 0, r.stderr


def test_fake_quant_gpt2_conv1d_and_tied_head(tmp_path):
    """GPT-2 style layers (transformers' Conv1D, weight stored [in, out]) are
    quantised along their input dimension too, and a head tied to the token
    embedding is untied: the embedding keeps its float weights."""
    from transformers import GPT2Config, GPT2LMHeadModel

    torch.manual_seed(0)
    cfg = GPT2Config(vocab_size=300, n_positions=32, n_embd=32, n_layer=1, n_head=2,
                     tie_word_embeddings=True)
    GPT2LMHeadModel(cfg).save_pretrained(tmp_path / "gpt2ish")
    orig = GPT2LMHeadModel.from_pretrained(tmp_path / "gpt2ish", local_files_only=True)
    model, layers = dump_logits.load_model(str(tmp_path / "gpt2ish"), "f32", "cpu", "int8", 16)
    q = dict(model.named_modules())
    conv = [n for n, m in orig.named_modules() if type(m).__name__ == "Conv1D"]
    assert len(conv) == 4 and layers == 5  # c_attn, c_proj, c_fc, mlp c_proj + lm_head
    for name in conv:
        w = orig.get_submodule(name).weight.detach().numpy()  # [in, out]
        want, scale = np_fake_quant(w.T, 127, 16)
        got = q[name].weight.detach().numpy()
        np.testing.assert_allclose(got, want.T, rtol=1e-6, atol=0)
        assert np.all(np.abs(got - w) <= scale.T / 2 * (1 + 1e-6))
    head = model.get_output_embeddings().weight.detach().numpy()
    emb = orig.get_input_embeddings().weight.detach().numpy()
    np.testing.assert_allclose(head, np_fake_quant(emb, 127, 16)[0], rtol=1e-6, atol=0)
    np.testing.assert_array_equal(model.get_input_embeddings().weight.detach().numpy(), emb)


def test_failed_run_leaves_no_shards(tiny_model, prompts_file, tmp_path, monkeypatch, capsys):
    """A forward pass failing half-way: exit 2, one message naming the prompt,
    and none of the shards already written stay behind."""
    real = dump_logits.forward_logits
    calls = []

    def flaky(model, ids, device):
        calls.append(1)
        if len(calls) == 9:
            raise RuntimeError("simulated failure")
        return real(model, ids, device)

    monkeypatch.setattr(dump_logits, "forward_logits", flaky)
    out = tmp_path / "broken"
    assert dump_logits.main([tiny_model, prompts_file, str(out), "--shard-rows", "20"]) == 2
    assert "prompt 9" in capsys.readouterr().err
    assert os.listdir(out) == []
