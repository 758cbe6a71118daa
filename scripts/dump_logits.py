#!/usr/bin/env python3
"""Dump full-vocabulary logits of a local Hugging Face causal LM for klgauge.

Logit dump (input of `klgauge compare`):

    dump_logits.py MODEL_DIR PROMPTS.jsonl OUT
        [--dtype f32|f16|bf16] [--compute-dtype f32|f16|bf16]
        [--fake-quant int8|int4] [--group-size N] [--max-tokens N]
        [--shard-rows N] [--device cpu] [--form centered|raw|logprobs]
        [--skip-first N] [--name NAME] [--overwrite]

  Writes OUT/part-00000.safetensors, part-00001.safetensors, ... in klgauge's
  2-D layout: `logits` [rows, vocab], `targets` I64 (the next token id at each
  position, -1 at the last position of a prompt), `mask` U8 (1 = counted),
  `prompt_offsets` I64 (local to the shard: 0 ... rows). A shard holds whole
  prompts only and is closed once it has at least --shard-rows rows.

Sampled log-probabilities (input of `klgauge estimate`):

    dump_logits.py sample MODEL_A MODEL_B PROMPTS.jsonl OUT.safetensors
        [--new-tokens N] [--seed S] [--fake-quant ...] [--group-size N] ...

  Draws a continuation of every prompt from model A at temperature 1 and
  writes `logprob_ref` (A's log-probability of each drawn token) and
  `logprob_cand` (B's), F32 [n], `prompt_offsets` I64 [prompts + 1] and the
  drawn ids `tokens` I64 [n]. --fake-quant applies to model B only (B may be
  the same directory as A).

Prompts file: one JSON object per line with `text` (a string, tokenised with
the model's tokenizer, special tokens added as that tokenizer does by
default) or `ids` (a list of token ids, used as they are). An optional
integer `count_from` marks the positions before it as not counted (mask 0),
e.g. to leave out a shared instruction preamble; --skip-first N does that for
every prompt.

--dtype is the storage type of the dumped logits; --compute-dtype the type
the model runs in (default f32). The default form is `centered` (row maximum
subtracted, computed in float64 before the cast) because raw logits of
magnitude ~25 stored in bf16 are rounded in steps of 1/8, which alone costs
about 1e-3 nats of KL; centered rows keep the probable tokens near 0 where the
steps are tiny (see scripts/floor_model.py).

--fake-quant rounds the weight of every nn.Linear (and transformers' Conv1D)
group-wise along the input dimension to the nearest level of a symmetric grid:
per group scale = max|w| / qmax (qmax = 127 for int8, 7 for int4), w' =
clamp(round(w / scale), -qmax, qmax) * scale. Embeddings, norms and biases
are left alone. --group-size 0 uses one group per output row.

Everything is read from local files only; nothing touches the network.
Bad input ends with one message naming the file and the problem, exit 2.
"""
from __future__ import annotations

import argparse
import glob
import itertools
import json
import os
import sys
import time

# Never reach a model hub: local files only.
os.environ.setdefault("HF_HUB_OFFLINE", "1")
os.environ.setdefault("TRANSFORMERS_OFFLINE", "1")
os.environ.setdefault("HF_HUB_DISABLE_TELEMETRY", "1")
os.environ.setdefault("TRANSFORMERS_VERBOSITY", "error")
os.environ.setdefault("HF_HUB_DISABLE_PROGRESS_BARS", "1")

PROG = "dump_logits.py"
DTYPES = ("f32", "f16", "bf16")
FORMS = ("centered", "raw", "logprobs")
QMAX = {"int8": 127, "int4": 7}


class InputError(Exception):
    """Bad usage or bad input: reported as one line, exit code 2."""


def torch_dtype(name: str):
    import torch

    return {"f32": torch.float32, "f16": torch.float16, "bf16": torch.bfloat16}[name]


# --------------------------------------------------------------------------
# fake quantisation

def fake_quantize_weight(w, qmax: int, group_size: int):
    """Group-wise symmetric round-to-nearest of a 2-D weight [out, in] along `in`.

    Returns a float32 tensor of the same shape. Groups are consecutive runs of
    `group_size` input columns (the last one shorter when `in` is not a
    multiple); group_size <= 0 means one group per row.
    """
    import torch

    w = w.detach().to(torch.float32)
    if w.dim() != 2:
        raise ValueError(f"expected a 2-D weight, got shape {tuple(w.shape)}")
    out_f, in_f = w.shape
    g = in_f if group_size <= 0 else group_size
    pad = (-in_f) % g
    wp = torch.nn.functional.pad(w, (0, pad)) if pad else w
    groups = wp.reshape(out_f, -1, g)
    scale = groups.abs().amax(dim=-1, keepdim=True) / qmax
    safe = torch.where(scale > 0, scale, torch.ones_like(scale))
    q = torch.clamp(torch.round(groups / safe), -qmax, qmax)
    deq = torch.where(scale > 0, q * safe, torch.zeros_like(groups))
    return deq.reshape(out_f, -1)[:, :in_f].contiguous()


def fake_quantize_model(model, kind: str, group_size: int) -> int:
    """Fake-quantise every linear layer of `model` in place; returns the count."""
    import torch

    qmax = QMAX[kind]
    count = 0
    for module in model.modules():
        is_linear = isinstance(module, torch.nn.Linear)
        # transformers' Conv1D (GPT-2 family) stores the weight as [in, out].
        is_conv1d = type(module).__name__ == "Conv1D" and getattr(module, "weight", None) is not None \
            and module.weight.dim() == 2
        if not (is_linear or is_conv1d):
            continue
        w = module.weight
        if is_linear:
            new = fake_quantize_weight(w, qmax, group_size)
        else:
            new = fake_quantize_weight(w.t(), qmax, group_size).t().contiguous()
        # A fresh Parameter: a weight shared with an embedding stays unchanged
        # there (the linear layer is untied from it).
        module.weight = torch.nn.Parameter(new.to(w.dtype), requires_grad=False)
        count += 1
    return count


# --------------------------------------------------------------------------
# loading

def load_tokenizer(model_dir: str):
    from transformers import AutoTokenizer

    try:
        return AutoTokenizer.from_pretrained(model_dir, local_files_only=True)
    except Exception as e:  # noqa: BLE001 - any loader failure is an input problem
        raise InputError(f"{model_dir}: cannot load a tokenizer: {e}") from e


def check_model_dir(model_dir: str) -> None:
    if not os.path.isdir(model_dir):
        raise InputError(f"{model_dir}: not a directory (a local model directory is needed)")
    if not os.path.isfile(os.path.join(model_dir, "config.json")):
        raise InputError(f"{model_dir}: no config.json, not a saved transformers model")


def load_model(model_dir: str, compute_dtype: str = "f32", device: str = "cpu",
               fake_quant: str | None = None, group_size: int = 64):
    """Load a causal LM from a local directory, optionally fake-quantised."""
    import torch
    import transformers
    from transformers import AutoModelForCausalLM

    check_model_dir(model_dir)
    # Fake quantisation is done in float32, then the model is cast.
    load_dtype = torch.float32 if fake_quant else torch_dtype(compute_dtype)
    major, minor = (int(x) for x in transformers.__version__.split(".")[:2])
    kw = {"dtype": load_dtype} if (major, minor) >= (4, 56) else {"torch_dtype": load_dtype}
    try:
        model = AutoModelForCausalLM.from_pretrained(model_dir, local_files_only=True, **kw)
    except Exception as e:  # noqa: BLE001
        raise InputError(f"{model_dir}: cannot load a causal language model: {e}") from e
    model.to(load_dtype)
    layers = 0
    if fake_quant:
        layers = fake_quantize_model(model, fake_quant, group_size)
        if layers == 0:
            raise InputError(f"{model_dir}: --fake-quant found no linear layers to quantise")
        model.to(torch_dtype(compute_dtype))
    try:
        model.to(device)
    except Exception as e:  # noqa: BLE001
        raise InputError(f"--device {device}: {e}") from e
    model.eval()
    return model, layers


def tokenizer_hint(model_dir: str) -> str:
    tj = os.path.join(model_dir, "tokenizer.json")
    return os.path.abspath(tj if os.path.isfile(tj) else model_dir)


# --------------------------------------------------------------------------
# prompts

def read_records(path: str, skip_first: int):
    """Parse and check a JSONL prompts file (no tokenizer needed, so bad input
    is reported before any model is loaded). Returns (where, record) pairs."""
    if not os.path.isfile(path):
        raise InputError(f"{path}: no such file")
    records = []
    try:
        with open(path, encoding="utf-8") as f:
            lines = list(f)
    except (OSError, UnicodeDecodeError) as e:
        raise InputError(f"{path}: cannot read ({e})") from e
    for lineno, line in enumerate(lines, 1):
        if not line.strip():
            continue
        where = f"{path}:{lineno}"
        try:
            rec = json.loads(line)
        except json.JSONDecodeError as e:
            raise InputError(f"{where}: not valid JSON ({e.msg})") from e
        if not isinstance(rec, dict):
            raise InputError(f"{where}: expected a JSON object with a 'text' or 'ids' field")
        if "ids" in rec:
            ids = rec["ids"]
            if not isinstance(ids, list) or not all(isinstance(i, int) and not isinstance(i, bool) for i in ids):
                raise InputError(f"{where}: 'ids' must be a list of integers")
        elif "text" in rec:
            if not isinstance(rec["text"], str):
                raise InputError(f"{where}: 'text' must be a string")
        else:
            raise InputError(f"{where}: needs a 'text' or an 'ids' field")
        count_from = rec.get("count_from", skip_first)
        if not isinstance(count_from, int) or isinstance(count_from, bool) or count_from < 0:
            raise InputError(f"{where}: 'count_from' must be a non-negative integer")
        records.append((where, rec))
    if not records:
        raise InputError(f"{path}: no prompts")
    return records


def tokenize_records(records, tokenizer, max_tokens: int, skip_first: int, vocab: int):
    """(ids, count_from) per record; given `ids` must lie in 0..vocab-1 (the
    model's input vocabulary); prompts are cut to max_tokens when it is > 0."""
    prompts, cut = [], 0
    for where, rec in records:
        if "ids" in rec:
            ids = list(rec["ids"])
            bad = [i for i in ids if i < 0 or i >= vocab]
            if bad:
                raise InputError(f"{where}: token id {bad[0]} outside the model's vocabulary 0..{vocab - 1}")
        else:
            ids = list(tokenizer(rec["text"])["input_ids"])
        if 0 < max_tokens < len(ids):
            ids = ids[:max_tokens]
            cut += 1
        if not ids:
            raise InputError(f"{where}: the prompt has no tokens")
        prompts.append((ids, rec.get("count_from", skip_first)))
    if cut:
        print(f"{PROG}: note: {cut} prompt(s) cut to {max_tokens} tokens", file=sys.stderr)
    return prompts


def input_vocab(model) -> int:
    return int(model.get_input_embeddings().weight.shape[0])


def context_limit(model) -> int:
    for key in ("max_position_embeddings", "n_positions", "max_sequence_length"):
        v = getattr(model.config, key, None)
        if isinstance(v, int) and v > 0:
            return v
    return 0


# --------------------------------------------------------------------------
# logits

def forward_logits(model, ids, device: str):
    """float64 logits [len(ids), vocab] of one prompt (batch of one, no padding)."""
    import torch

    x = torch.tensor([ids], dtype=torch.long, device=device)
    with torch.inference_mode():
        out = model(input_ids=x, use_cache=False)
    return out.logits[0].to("cpu", torch.float64)


def apply_form(z, form: str):
    import torch

    if form == "raw":
        return z
    if form == "centered":
        return z - z.max(dim=-1, keepdim=True).values
    if form == "logprobs":
        return torch.log_softmax(z, dim=-1)
    raise ValueError(form)


def write_safetensors(path: str, tensors: dict, metadata: dict):
    """Write atomically: a half-written file never carries the final name."""
    from safetensors.torch import save_file

    tmp = path + ".tmp"
    save_file({k: v.contiguous() for k, v in tensors.items()}, tmp,
              metadata={k: str(v) for k, v in metadata.items()})
    umask = os.umask(0)
    os.umask(umask)
    os.chmod(tmp, 0o666 & ~umask)  # the writer creates 0600; follow the user's umask
    os.replace(tmp, path)


def run_dump(args) -> int:
    if args.shard_rows < 1:
        raise InputError(f"--shard-rows must be at least 1, got {args.shard_rows}")
    if args.max_tokens < 0:
        raise InputError(f"--max-tokens must be non-negative, got {args.max_tokens}")
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise InputError(f"{args.out}: exists and is not a directory")
    old = sorted(glob.glob(os.path.join(args.out, "part-*.safetensors")))
    if old and not args.overwrite:
        raise InputError(f"{args.out}: already holds {len(old)} shard(s); use --overwrite to replace them")

    records = read_records(args.prompts, args.skip_first)
    check_model_dir(args.model_dir)
    t0 = time.time()
    import torch

    if args.threads > 0:
        torch.set_num_threads(args.threads)
    tokenizer = load_tokenizer(args.model_dir)
    model, layers = load_model(args.model_dir, args.compute_dtype, args.device,
                               args.fake_quant, args.group_size)
    limit = context_limit(model)
    max_tokens = args.max_tokens or limit
    if limit and max_tokens > limit:
        raise InputError(f"--max-tokens {max_tokens} exceeds the model's context of {limit} tokens")
    prompts = tokenize_records(records, tokenizer, max_tokens, args.skip_first, input_vocab(model))

    os.makedirs(args.out, exist_ok=True)
    for f in old:
        os.remove(f)
    name = args.name or default_name(args.model_dir, args.fake_quant, args.group_size, args.compute_dtype)
    meta = {
        "model": name,
        "logits_form": args.form,
        "tokenizer": tokenizer_hint(args.model_dir),
        "producer": "klgauge scripts/dump_logits.py",
        "source_model_dir": os.path.abspath(args.model_dir),
        "prompts_file": os.path.abspath(args.prompts),
        "storage_dtype": args.dtype,
        "compute_dtype": args.compute_dtype,
        "fake_quant": args.fake_quant or "none",
    }
    if args.fake_quant:
        meta["fake_quant_group_size"] = args.group_size
        meta["fake_quant_rounding"] = "symmetric, round to nearest, scale = max|w| / qmax per group"
        meta["fake_quant_layers"] = layers
    store = torch_dtype(args.dtype)

    shard, parts, shard_rows, total_rows, counted = 0, [], 0, 0, 0
    vocab = None

    def flush():
        nonlocal shard, parts, shard_rows
        lengths = [p[0].shape[0] for p in parts]
        offsets = torch.tensor([0] + list(itertools.accumulate(lengths)), dtype=torch.int64)
        tensors = {
            "logits": torch.cat([p[0] for p in parts]),
            "targets": torch.cat([p[1] for p in parts]),
            "mask": torch.cat([p[2] for p in parts]),
            "prompt_offsets": offsets,
        }
        path = os.path.join(args.out, f"part-{shard:05d}.safetensors")
        write_safetensors(path, tensors, dict(meta, shard_index=shard, prompts_in_shard=len(parts)))
        shard += 1
        parts, shard_rows = [], 0
        return path

    written = []
    try:
        for index, (ids, count_from) in enumerate(prompts):
            try:
                z = forward_logits(model, ids, args.device)
            except RuntimeError as e:
                raise InputError(f"{args.prompts}: prompt {index + 1}: the forward pass failed: {e}") from e
            if vocab is None:
                vocab = z.shape[1]
                meta["vocab"] = vocab
            v = apply_form(z, args.form).to(store)
            n = len(ids)
            targets = torch.tensor(ids[1:] + [-1], dtype=torch.int64)
            mask = torch.zeros(n, dtype=torch.uint8)
            mask[min(count_from, n):] = 1
            parts.append((v, targets, mask))
            shard_rows += n
            total_rows += n
            counted += int(mask.sum())
            if shard_rows >= args.shard_rows:
                written.append(flush())
        if parts:
            written.append(flush())
    except BaseException:
        # no half-finished dump: remove the shards of this run
        for path in written + glob.glob(os.path.join(args.out, "part-*.safetensors.tmp")):
            if os.path.exists(path):
                os.remove(path)
        raise
    print(f"{PROG}: {len(prompts)} prompts, {total_rows} rows ({counted} counted), vocab {vocab}, "
          f"{shard} shard(s) in {args.out}, {time.time() - t0:.1f}s", file=sys.stderr)
    return 0


def default_name(model_dir: str, fake_quant, group_size: int, compute_dtype: str) -> str:
    name = os.path.basename(os.path.normpath(model_dir)) or model_dir
    extra = []
    if fake_quant:
        extra.append(f"fake {fake_quant}, group {group_size}" if group_size > 0 else f"fake {fake_quant}, per row")
    if compute_dtype != "f32":
        extra.append(f"{compute_dtype} compute")
    return f"{name} ({'; '.join(extra)})" if extra else name


# --------------------------------------------------------------------------
# sampling

def sample_continuation(model, ids, new_tokens: int, seed: int, device: str, eos_ids=frozenset()):
    """Draw up to `new_tokens` tokens from `model` at temperature 1 (KV cache).

    The draws use a CPU generator on float64 probabilities so that a seed gives
    the same tokens whatever the device.
    """
    import torch

    gen = torch.Generator(device="cpu").manual_seed(seed)
    x = torch.tensor([ids], dtype=torch.long, device=device)
    drawn = []
    # Newer transformers name the key/value cache `cache`, older ones
    # `past_key_values` (argument and output alike).
    import inspect

    cache_arg = "cache" if "cache" in inspect.signature(model.forward).parameters else "past_key_values"
    with torch.inference_mode():
        out = model(input_ids=x, use_cache=True)
        for step in range(new_tokens):
            probs = torch.softmax(out.logits[0, -1].to("cpu", torch.float64), dim=-1)
            tok = int(torch.multinomial(probs, 1, generator=gen))
            drawn.append(tok)
            if tok in eos_ids:
                break
            if step + 1 == new_tokens:
                break
            nxt = torch.tensor([[tok]], dtype=torch.long, device=device)
            past = out.get("cache") if out.get("cache") is not None else out.get("past_key_values")
            out = model(input_ids=nxt, use_cache=True, **{cache_arg: past})
    return drawn


def token_logprobs(model, seq, start: int, device: str):
    """log-probabilities (float64) of seq[start:] under `model`, one full pass."""
    import torch

    z = forward_logits(model, seq, device)
    lp = torch.log_softmax(z, dim=-1)
    pos = torch.arange(start - 1, len(seq) - 1)
    return lp[pos, torch.tensor(seq[start:], dtype=torch.long)]


def run_sample(args) -> int:
    if args.new_tokens < 1:
        raise InputError(f"--new-tokens must be at least 1, got {args.new_tokens}")
    if os.path.isdir(args.out):
        raise InputError(f"{args.out}: is a directory; sample mode writes one .safetensors file")
    if os.path.exists(args.out) and not args.overwrite:
        raise InputError(f"{args.out}: already exists; use --overwrite to replace it")
    records = read_records(args.prompts, 0)
    check_model_dir(args.model_a)
    check_model_dir(args.model_b)
    t0 = time.time()
    import torch

    if args.threads > 0:
        torch.set_num_threads(args.threads)
    tok_a = load_tokenizer(args.model_a)
    model_a, _ = load_model(args.model_a, args.compute_dtype, args.device)
    model_b, layers = load_model(args.model_b, args.compute_dtype, args.device,
                                 args.fake_quant, args.group_size)
    va = model_a.get_output_embeddings().weight.shape[0]
    vb = model_b.get_output_embeddings().weight.shape[0]
    if va != vb:
        raise InputError(f"{args.model_b}: vocabulary {vb} differs from {args.model_a}'s {va}")
    limit = min(x for x in (context_limit(model_a), context_limit(model_b), 1 << 62) if x > 0)
    max_prompt = args.max_tokens if args.max_tokens > 0 else limit - args.new_tokens
    if max_prompt < 1 or max_prompt + args.new_tokens > limit:
        raise InputError(f"--max-tokens {args.max_tokens} with --new-tokens {args.new_tokens} "
                         f"does not fit the models' context of {limit} tokens")
    prompts = tokenize_records(records, tok_a, max_prompt, 0,
                               min(input_vocab(model_a), input_vocab(model_b)))
    eos = None if args.no_eos_stop else model_a.config.eos_token_id
    eos = set(eos) if isinstance(eos, (list, tuple)) else ({eos} if isinstance(eos, int) else set())

    ref, cand, toks, offsets = [], [], [], [0]
    for i, (ids, _) in enumerate(prompts):
        drawn = sample_continuation(model_a, ids, args.new_tokens, args.seed * 1_000_003 + i,
                                    args.device, eos)
        seq = ids + drawn
        ref.append(token_logprobs(model_a, seq, len(ids), args.device))
        cand.append(token_logprobs(model_b, seq, len(ids), args.device))
        toks.extend(drawn)
        offsets.append(offsets[-1] + len(drawn))
    meta = {
        "model_ref": args.name_a or default_name(args.model_a, None, 0, args.compute_dtype),
        "model_cand": args.name_b or default_name(args.model_b, args.fake_quant, args.group_size,
                                                  args.compute_dtype),
        "tokenizer": tokenizer_hint(args.model_a),
        "producer": "klgauge scripts/dump_logits.py sample",
        "prompts_file": os.path.abspath(args.prompts),
        "sampling": "temperature 1, no top-k/top-p, drawn from model_ref",
        "new_tokens": args.new_tokens,
        "seed": args.seed,
        "stop_at_eos": f"yes (ids {sorted(eos)})" if eos else "no",
        "compute_dtype": args.compute_dtype,
        "fake_quant": args.fake_quant or "none",
    }
    if args.fake_quant:
        meta["fake_quant_group_size"] = args.group_size
        meta["fake_quant_layers"] = layers
    parent = os.path.dirname(os.path.abspath(args.out))
    os.makedirs(parent, exist_ok=True)
    write_safetensors(args.out, {
        "logprob_ref": torch.cat(ref).to(torch.float32),
        "logprob_cand": torch.cat(cand).to(torch.float32),
        "prompt_offsets": torch.tensor(offsets, dtype=torch.int64),
        "tokens": torch.tensor(toks, dtype=torch.int64),
    }, meta)
    print(f"{PROG} sample: {len(prompts)} prompts, {offsets[-1]} drawn tokens -> {args.out}, "
          f"{time.time() - t0:.1f}s", file=sys.stderr)
    return 0


# --------------------------------------------------------------------------
# command line

def add_model_options(ap):
    ap.add_argument("--compute-dtype", choices=DTYPES, default="f32",
                    help="type the model runs in (default f32)")
    ap.add_argument("--fake-quant", choices=sorted(QMAX), default=None,
                    help="round the linear weights to a symmetric int8/int4 grid first")
    ap.add_argument("--group-size", type=int, default=64,
                    help="input columns per quantisation group (default 64; 0 = whole row)")
    ap.add_argument("--max-tokens", type=int, default=0,
                    help="truncate each prompt to N tokens (default: the model's context)")
    ap.add_argument("--device", default="cpu", help="torch device (default cpu)")
    ap.add_argument("--threads", type=int, default=0,
                    help="CPU threads for torch (default: torch's own choice)")
    ap.add_argument("--overwrite", action="store_true", help="replace existing output")


class Parser(argparse.ArgumentParser):
    def error(self, message):  # exit code 2 with one line, as argparse does, plus the program
        self.print_usage(sys.stderr)
        print(f"{self.prog}: {message}", file=sys.stderr)
        sys.exit(2)


def parse(argv):
    if argv and argv[0] == "sample":
        ap = Parser(prog=f"{PROG} sample",
                    description="sampled log-probabilities of model A's continuations under A and B")
        ap.add_argument("model_a", metavar="MODEL_A")
        ap.add_argument("model_b", metavar="MODEL_B")
        ap.add_argument("prompts", metavar="PROMPTS.jsonl")
        ap.add_argument("out", metavar="OUT.safetensors")
        ap.add_argument("--new-tokens", type=int, default=32, help="tokens drawn per prompt (default 32)")
        ap.add_argument("--seed", type=int, default=0, help="seed of the draws (default 0)")
        ap.add_argument("--no-eos-stop", action="store_true",
                        help="keep drawing after an end-of-sequence token")
        ap.add_argument("--name-a", default=None, help="display name of model A")
        ap.add_argument("--name-b", default=None, help="display name of model B")
        add_model_options(ap)
        args = ap.parse_args(argv[1:])
        args.mode = "sample"
        return args
    ap = Parser(prog=PROG, description="dump full-vocabulary logits in klgauge's layout",
                epilog=f"see also: {PROG} sample --help")
    ap.add_argument("model_dir", metavar="MODEL_DIR")
    ap.add_argument("prompts", metavar="PROMPTS.jsonl")
    ap.add_argument("out", metavar="OUT")
    ap.add_argument("--dtype", choices=DTYPES, default="f32", help="storage type of the logits (default f32)")
    ap.add_argument("--form", choices=FORMS, default="centered",
                    help="centered (row max subtracted, default), raw, or logprobs")
    ap.add_argument("--shard-rows", type=int, default=2048,
                    help="close a shard once it has this many rows (default 2048)")
    ap.add_argument("--skip-first", type=int, default=0,
                    help="do not count the first N positions of each prompt (default 0)")
    ap.add_argument("--name", default=None, help="display name stored as `model`")
    add_model_options(ap)
    args = ap.parse_args(argv)
    if args.skip_first < 0:
        ap.error(f"--skip-first must be non-negative, got {args.skip_first}")
    args.mode = "dump"
    return args


def main(argv=None) -> int:
    args = parse(sys.argv[1:] if argv is None else argv)
    try:
        return run_sample(args) if args.mode == "sample" else run_dump(args)
    except InputError as e:
        print(f"{PROG}: {e}", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
