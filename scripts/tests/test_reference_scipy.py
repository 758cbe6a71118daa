"""Every per-position value and every aggregate of `klgauge compare` against an
independent float64 computation with numpy/scipy on the SAME stored values
(each file's F32/F16/BF16 values are decoded to float64 first).

Sources of the reference values, named beside each check:
- scipy.special.log_softmax, scipy.special.rel_entr (x*log(x/y), 0 at x=0,
  +inf at x>0, y=0) for kl and kl_reverse,
- scipy.stats.entropy (-sum p log p, natural log) for the entropies,
- scipy.spatial.distance.jensenshannon (returns the square root of the JS
  divergence; natural log by default) for js,
- numpy.argmax (first maximum, i.e. lowest id on ties) for top1_agree,
- numpy.percentile (method "linear") for p50/p90/p99/p999,
- a cluster-robust ratio-estimator variance written out in numpy for ci95.
Tolerance (contract of the core): max(1e-4 relative, 1e-7 absolute).
"""

from __future__ import annotations

import math
import os
import sys
import zlib
from dataclasses import dataclass, field

import numpy as np
import pytest
import scipy.spatial.distance
import scipy.special
import scipy.stats

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))
import st_write  # noqa: E402
from klg_cli import CSV_COLUMNS, close, is_strict_json, needs_binary, num, read_csv, read_json, run  # noqa: E402

pytestmark = needs_binary

DTYPES = ["F32", "F16", "BF16"]
LN2 = math.log(2.0)
SAMPLES = "4"  # keep the estimators cheap; they are checked elsewhere


# --------------------------------------------------------------------------
# reference computation

def reference_metrics(ref, cand, targets=None):
    """ref, cand: float64 [R, V] (stored values). Returns a dict of [R] arrays."""
    lp = scipy.special.log_softmax(ref, axis=1)  # scipy.special.log_softmax
    lq = scipy.special.log_softmax(cand, axis=1)
    p, q = np.exp(lp), np.exp(lq)
    out = {
        "kl": scipy.special.rel_entr(p, q).sum(axis=1),  # scipy.special.rel_entr
        "kl_reverse": scipy.special.rel_entr(q, p).sum(axis=1),  # scipy.special.rel_entr
        "tv": 0.5 * np.abs(p - q).sum(axis=1),  # definition, numpy
        "top1_agree": (np.argmax(ref, axis=1) == np.argmax(cand, axis=1)).astype(int),  # numpy.argmax: first max
        "entropy_ref": scipy.stats.entropy(p, axis=1),  # scipy.stats.entropy, natural log
        "entropy_cand": scipy.stats.entropy(q, axis=1),
        # scipy.spatial.distance.jensenshannon returns sqrt(JS); natural log base by default
        "js": scipy.spatial.distance.jensenshannon(p, q, axis=1) ** 2,
    }
    R = ref.shape[0]
    nr, nc = np.full(R, np.nan), np.full(R, np.nan)
    if targets is not None:
        has = targets >= 0
        idx = np.where(has, targets, 0)
        nr = np.where(has, -lp[np.arange(R), idx], np.nan)
        nc = np.where(has, -lq[np.arange(R), idx], np.nan)
    out["nll_ref"], out["nll_cand"] = nr, nc
    return out


# --------------------------------------------------------------------------
# cases: files on disk plus the flat row table they stand for

@dataclass
class Case:
    ref_path: str
    cand_path: str
    ref: np.ndarray  # float64 [R, V], stored values
    cand: np.ndarray
    prompt: np.ndarray  # [R]
    position: np.ndarray  # [R]
    n_prompts: int
    targets: np.ndarray | None = None
    mask: np.ndarray | None = None
    extra: dict = field(default_factory=dict)

    @property
    def rows(self):
        return self.ref.shape[0]

    @property
    def counted(self):
        return np.ones(self.rows, bool) if self.mask is None else self.mask.astype(bool)


def make_pair(rng, n, vocab, scale=3.0):
    """Reference logits and a candidate with a per-row noise level spread over
    three decades, so KL spans ~1e-6 .. 1 nats."""
    ref = rng.normal(size=(n, vocab)) * scale + rng.normal(size=(n, 1)) * 5
    lev = 10 ** rng.uniform(-2.5, 0.2, size=(n, 1))
    cand = ref + rng.normal(size=(n, vocab)) * lev
    return ref, cand


def make_targets(rng, n, vocab):
    t = rng.integers(0, vocab, size=n)
    t[rng.random(n) < 0.15] = -1
    return t


def make_mask(rng, n):
    m = (rng.random(n) > 0.2).astype(np.uint8)
    m[0] = 1
    return m


def write_file(path, dtype, logits, targets=None, mask=None, offsets=None,
               tdtype="I64", mdtype="U8", model="Wren-7"):
    t = {"logits": (dtype, logits)}
    if targets is not None:
        t["targets"] = (tdtype, targets)
    if mask is not None:
        t["mask"] = (mdtype, mask)
    if offsets is not None:
        t["prompt_offsets"] = ("I64", offsets)
    st_write.write(path, t, metadata={"model": model, "logits_form": "raw"})


def side_dtypes(dtype):
    # vary the integer/bool dtypes with the float dtype so all spec'd ones are exercised
    return {"F32": ("I64", "U8"), "F16": ("I32", "BOOL"), "BF16": ("I64", "BOOL")}[dtype]


def build_case(tmp, layout, dtype, with_tm, seed=0, vocab=50):
    rng = np.random.default_rng(zlib.crc32(f"{layout}/{dtype}/{with_tm}/{seed}".encode()))
    tdt, mdt = side_dtypes(dtype)
    rp, cp = os.path.join(tmp, "ref"), os.path.join(tmp, "cand")

    if layout == "rows":
        R = 24
        ref, cand = make_pair(rng, R, vocab)
        tg = make_targets(rng, R, vocab) if with_tm else None
        mk = make_mask(rng, R) if with_tm else None
        rp, cp = rp + ".safetensors", cp + ".safetensors"
        write_file(rp, dtype, ref, tg, mk, tdtype=tdt, mdtype=mdt)
        write_file(cp, dtype, cand, tg, mk, tdtype=tdt, mdtype=mdt, model="Wren-7-q4")
        prompt, pos, G = np.arange(R), np.zeros(R, int), R

    elif layout == "seq3d":
        S, L = 5, 6
        R = S * L
        ref, cand = make_pair(rng, R, vocab)
        tg = make_targets(rng, R, vocab) if with_tm else None
        mk = make_mask(rng, R) if with_tm else None
        rs = lambda a: None if a is None else a.reshape(S, L, *a.shape[1:])  # noqa: E731
        rp, cp = rp + ".safetensors", cp + ".safetensors"
        write_file(rp, dtype, rs(ref), rs(tg), rs(mk), tdtype=tdt, mdtype=mdt)
        write_file(cp, dtype, rs(cand), rs(tg), rs(mk), tdtype=tdt, mdtype=mdt, model="Wren-7-q4")
        prompt, pos, G = np.repeat(np.arange(S), L), np.tile(np.arange(L), S), S

    elif layout == "offsets":
        offs = np.array([0, 4, 11, 12, 20, 30])  # includes a one-row prompt
        R = int(offs[-1])
        ref, cand = make_pair(rng, R, vocab)
        tg = make_targets(rng, R, vocab) if with_tm else None
        mk = make_mask(rng, R) if with_tm else None
        rp, cp = rp + ".safetensors", cp + ".safetensors"
        write_file(rp, dtype, ref, tg, mk, offsets=offs, tdtype=tdt, mdtype=mdt)
        write_file(cp, dtype, cand, tg, mk, offsets=offs, tdtype=tdt, mdtype=mdt, model="Wren-7-q4")
        prompt = np.searchsorted(offs, np.arange(R), side="right") - 1
        pos = np.arange(R) - offs[prompt]
        G = len(offs) - 1

    elif layout == "shards":
        # three 3-D shards; names chosen so that lexical order (part-10, part-2,
        # part-3) differs from numeric order: the spec fixes lexical order.
        L = 4
        names_seqs = [("part-10.safetensors", 2), ("part-2.safetensors", 3), ("part-3.safetensors", 1)]
        S = sum(s for _, s in names_seqs)
        R = S * L
        ref, cand = make_pair(rng, R, vocab)
        tg = make_targets(rng, R, vocab) if with_tm else None
        mk = make_mask(rng, R) if with_tm else None
        os.makedirs(rp)
        os.makedirs(cp)
        r0 = 0
        # write in an order different from the lexical one
        order = sorted(names_seqs)  # lexical
        spans = {}
        for name, s in order:
            spans[name] = (r0, r0 + s * L, s)
            r0 += s * L
        for name, s in reversed(names_seqs):
            a, b, s = spans[name]
            sl = lambda x: None if x is None else x[a:b].reshape(s, L, *x.shape[1:])  # noqa: E731
            write_file(os.path.join(rp, name), dtype, sl(ref), sl(tg), sl(mk), tdtype=tdt, mdtype=mdt)
            write_file(os.path.join(cp, name), dtype, sl(cand), sl(tg), sl(mk), tdtype=tdt, mdtype=mdt,
                       model="Wren-7-q4")
        prompt, pos, G = np.repeat(np.arange(S), L), np.tile(np.arange(L), S), S
    else:
        raise ValueError(layout)

    return Case(rp, cp, st_write.stored_f64(ref, dtype), st_write.stored_f64(cand, dtype),
                prompt, pos, G, tg, mk)


# --------------------------------------------------------------------------
# checking

def compare(case, tmp, *extra, rc=0):
    out_csv, out_json = os.path.join(tmp, "out.csv"), os.path.join(tmp, "out.json")
    run("compare", case.ref_path, case.cand_path, "--csv", out_csv, "--json", out_json,
        "--samples", SAMPLES, *extra, check_rc=rc)
    header, lines = read_csv(out_csv)
    return header, lines, read_json(out_json)


def check_csv(case, header, lines, exp, js=False, scale=1.0, nll_scale=None, ent_scale=None):
    """Compare each CSV line with the expected [R] arrays (returns the list of
    mismatches). `scale` divides the divergences (ln 2 for --bits)."""
    nll_scale = scale if nll_scale is None else nll_scale
    ent_scale = scale if ent_scale is None else ent_scale
    want_header = CSV_COLUMNS + (["js"] if js else [])
    assert header == want_header, f"CSV header {header}, want {want_header}"
    counted = np.flatnonzero(case.counted)
    assert len(lines) == len(counted), f"{len(lines)} CSV lines, {len(counted)} counted positions"
    got_rows = [int(ln["row"]) for ln in lines]
    assert sorted(got_rows) == list(counted), "CSV rows are not the counted rows"
    bad = []
    for ln in lines:
        r = int(ln["row"])
        if int(ln["prompt"]) != case.prompt[r] or int(ln["position"]) != case.position[r]:
            bad.append(f"row {r}: prompt/position {ln['prompt']}/{ln['position']}, "
                       f"want {case.prompt[r]}/{case.position[r]}")
        t = None if case.targets is None or case.targets[r] < 0 else int(case.targets[r])
        gt = num(ln["target"])
        if (None if gt is None else int(gt)) != t:
            bad.append(f"row {r}: target {ln['target']!r}, want {t}")
        checks = [("kl", scale), ("kl_reverse", scale), ("tv", 1.0),
                  ("entropy_ref", ent_scale), ("entropy_cand", ent_scale)]
        if js:
            checks.append(("js", scale))
        for key, sc in checks:
            want = exp[key][r] / sc
            if not close(num(ln[key]), want):
                bad.append(f"row {r}: {key} {ln[key]}, want {want!r}")
        if int(num(ln["top1_agree"])) != exp["top1_agree"][r]:
            bad.append(f"row {r}: top1_agree {ln['top1_agree']}, want {exp['top1_agree'][r]}")
        for key in ("nll_ref", "nll_cand"):
            want = exp[key][r]
            want = None if np.isnan(want) else want / nll_scale
            if not close(num(ln[key]), want):
                bad.append(f"row {r}: {key} {ln[key]!r}, want {want!r}")
    return bad


def report(bad):
    """Fail with every mismatch of the CSV and the JSON, counted per key."""
    if not bad:
        return
    keys = {}
    for b in bad:
        k = b.split(":")[1].split()[0] if b.startswith("row ") else b.split()[0]
        keys[k] = keys.get(k, 0) + 1
    pytest.fail(f"{len(bad)} mismatches {keys}, first ones:\n" + "\n".join(bad[:15]), pytrace=False)


def pct(x, qs=(50, 90, 99, 99.9)):
    return dict(zip(("p50", "p90", "p99", "p999"), np.percentile(x, qs, method="linear")))


def check_aggregate(obj, values, name):
    """An aggregate object against a finite float64 vector (numpy.mean,
    numpy.percentile linear, numpy.max)."""
    bad = []
    want = {"mean": float(np.mean(values)), "max": float(np.max(values)), **pct(values)}
    for k, w in want.items():
        if k not in obj or obj[k] is None or not close(float(obj[k]), w):
            bad.append(f"{name}.{k}: got {obj.get(k)!r}, want {w!r}")
    return bad


def count_of(v):
    """skipped_rows may be a number or a list of rows (the spec says 'listed')."""
    if isinstance(v, list):
        return len(v)
    if isinstance(v, dict):
        for k in ("count", "n", "total"):
            if k in v:
                return v[k]
        for k in ("rows", "list"):
            if k in v:
                return len(v[k])
    return v


def check_json(case, rep, exp, scale=1.0):
    bad = []
    assert rep.get("schema") == "klgauge-report/1", rep.get("schema")
    units = "nats" if scale == 1.0 else "bits"
    if rep.get("units") != units:
        bad.append(f"units {rep.get('units')!r}, want {units!r}")
    r = rep["reference"]
    for k, w in (("rows", case.rows), ("vocab", case.ref.shape[1]), ("prompts", case.n_prompts)):
        if r.get(k) != w:
            bad.append(f"reference.{k} {r.get(k)!r}, want {w}")
    c = rep["candidates"][0]
    m = case.counted
    if c.get("positions") != int(m.sum()):
        bad.append(f"positions {c.get('positions')!r}, want {int(m.sum())}")
    for key, sc in (("kl", scale), ("kl_reverse", scale), ("tv", 1.0),
                    ("entropy_ref", scale), ("entropy_cand", scale)):
        bad += check_aggregate(c[key], exp[key][m] / sc, key)
    rate = float(np.mean(exp["top1_agree"][m]))  # numpy.mean of the 0/1 flags
    if not close(c.get("top1_agree"), rate):
        bad.append(f"top1_agree {c.get('top1_agree')!r}, want {rate}")
    if count_of(c.get("skipped_rows")) != 0:
        bad.append(f"skipped_rows {c.get('skipped_rows')!r}, want 0")
    if c.get("infinite_kl") != 0:
        bad.append(f"infinite_kl {c.get('infinite_kl')!r}, want 0")
    if case.targets is not None:
        has = m & (case.targets >= 0)
        nr, nc = exp["nll_ref"][has], exp["nll_cand"][has]
        # perplexity = exp(mean nll), common practice; computed in nats
        want = {"ppl_ref": math.exp(nr.mean()), "ppl_cand": math.exp(nc.mean()),
                "ppl_ratio": math.exp(nc.mean() - nr.mean())}
        for k, w in want.items():
            if not close(c.get(k), w):
                bad.append(f"{k} {c.get(k)!r}, want {w!r}")
        bad += check_aggregate(c["nll_ref"], nr / scale, "nll_ref")
        bad += check_aggregate(c["nll_cand"], nc / scale, "nll_cand")
    else:
        for k in ("ppl_ref", "ppl_cand", "ppl_ratio"):
            if c.get(k, "absent") is not None:
                bad.append(f"{k} {c.get(k, 'absent')!r}, want null without targets")
    return bad


# --------------------------------------------------------------------------
# tests

LAYOUTS = ["rows", "seq3d", "offsets", "shards"]


@pytest.mark.parametrize("with_tm", [False, True], ids=["plain", "targets+mask"])
@pytest.mark.parametrize("layout", LAYOUTS)
@pytest.mark.parametrize("dtype", DTYPES)
def test_layouts(tmp_path, dtype, layout, with_tm):
    case = build_case(str(tmp_path), layout, dtype, with_tm)
    exp = reference_metrics(case.ref, case.cand, case.targets)
    header, lines, rep = compare(case, str(tmp_path))
    bad = check_csv(case, header, lines, exp) + check_json(case, rep, exp)
    if rep["candidates"][0].get("dtype") != dtype or rep["reference"].get("dtype") != dtype:
        bad.append(f"dtype {rep['reference'].get('dtype')}/{rep['candidates'][0].get('dtype')}, want {dtype}")
    report(bad)


def hard_rows(dtype, rng, vocab=64):
    """Rows that break naive arithmetic. Returns ref, cand (float64 before
    storage), targets, and the row index whose kl must be +inf."""
    V = vocab
    rows_r, rows_c = [], []

    def add(r, c):
        rows_r.append(np.asarray(r, float))
        rows_c.append(np.asarray(c, float))

    base = rng.normal(size=V) * 2
    add(base, base + rng.normal(size=V) * 1e-3)            # 0: KL ~ 5e-7
    add(base, base + rng.normal(size=V) * 1e-5)            # 1: KL ~ 5e-11
    near30 = 30 + rng.normal(size=V) * 0.5
    add(near30, near30 + rng.normal(size=V) * 0.05)        # 2: all logits near 30
    add(near30, near30 + rng.normal(size=V) * 2e-3)        # 3: near 30, tiny KL
    r = rng.normal(size=V) * 2
    c = r + rng.normal(size=V) * 0.1
    dead = rng.choice(V, 10, replace=False)
    r[dead] = -np.inf
    c[dead] = -np.inf
    add(r, c)                                              # 4: same tokens -inf in both
    r = rng.normal(size=V) * 2
    c = r + rng.normal(size=V) * 0.1
    c[[5, 17]] = -np.inf
    add(r, c)                                              # 5: candidate -inf where p > 0: kl = +inf
    r = rng.normal(size=V) * 2
    c = r + rng.normal(size=V) * 0.1
    r[[2, 9]] = -np.inf
    add(r, c)                                              # 6: reference -inf, candidate mass: kl finite
    big = -1000 + rng.normal(size=V) * 3
    add(big, big + rng.normal(size=V) * 0.2)               # 7: large negative offset
    peak = rng.normal(size=V)
    peak[11] += 40
    add(peak, peak + rng.normal(size=V) * 0.3)             # 8: p nearly one-hot
    u = np.zeros(V)
    t = np.zeros(V)
    t[[3, 7]] = 1.0
    add(u, t)                                              # 9: ties: argmax 0 vs 3
    add(t, t)                                              # 10: identical rows, ties, KL exactly 0
    targets = np.array([1, 2, 3, 4, int(np.setdiff1d(np.arange(V), dead)[0]), 0, 0, 5, 11, 3, 7])
    return np.array(rows_r), np.array(rows_c), targets, 5


@pytest.mark.parametrize("dtype", DTYPES)
def test_hard_rows(tmp_path, dtype):
    rng = np.random.default_rng({"F32": 11, "F16": 12, "BF16": 13}[dtype])
    ref, cand, tg, inf_row = hard_rows(dtype, rng)
    rp, cp = str(tmp_path / "ref.safetensors"), str(tmp_path / "cand.safetensors")
    write_file(rp, dtype, ref, tg)
    write_file(cp, dtype, cand, tg)
    R = ref.shape[0]
    case = Case(rp, cp, st_write.stored_f64(ref, dtype), st_write.stored_f64(cand, dtype),
                np.arange(R), np.zeros(R, int), R, tg)
    with np.errstate(invalid="ignore", divide="ignore"):
        exp = reference_metrics(case.ref, case.cand, tg)
    assert np.isinf(exp["kl"][inf_row]) and np.isfinite(np.delete(exp["kl"], inf_row)).all()
    if dtype == "F32":
        assert 1e-7 < exp["kl"][0] < 1e-6 and exp["kl"][1] < 1e-9  # the rows are as hard as meant
    header, lines, rep = compare(case, str(tmp_path))
    bad = check_csv(case, header, lines, exp)
    by_row = {int(ln["row"]): ln for ln in lines}
    # the CSV spelling of +inf (brief: `inf`)
    assert by_row[inf_row]["kl"] == "inf", f"kl field of the -inf row: {by_row[inf_row]['kl']!r}"
    # an infinite kl must not turn the report into non-standard JSON (RFC 8259 has no Infinity)
    assert is_strict_json(tmp_path / "out.json"), "out.json holds Infinity/NaN tokens"
    mean = rep["candidates"][0]["kl"]["mean"]
    assert mean is None or mean == math.inf, f"kl.mean with an infinite position: {mean!r}"
    c = rep["candidates"][0]
    assert c["infinite_kl"] == 1, f"infinite_kl {c.get('infinite_kl')!r}, want 1"
    assert count_of(c["skipped_rows"]) == 0
    assert c["positions"] == R
    report(bad)


def test_tiny_kl_relative_accuracy(tmp_path):
    """Beyond the contract's 1e-7 floor: f32 rows with KL of 1e-10 .. 1e-6
    should still be right to a few percent (the spec's reason for the
    cancellation-free form). Reference: scipy.special.rel_entr in float64."""
    rng = np.random.default_rng(21)
    V, R = 4096, 8
    ref = rng.normal(size=(R, V)) * 3 + 20
    lev = np.logspace(-5, -3, R)[:, None]
    cand = ref + rng.normal(size=(R, V)) * lev
    rp, cp = str(tmp_path / "ref.safetensors"), str(tmp_path / "cand.safetensors")
    write_file(rp, "F32", ref)
    write_file(cp, "F32", cand)
    case = Case(rp, cp, st_write.stored_f64(ref, "F32"), st_write.stored_f64(cand, "F32"),
                np.arange(R), np.zeros(R, int), R)
    exp = reference_metrics(case.ref, case.cand)
    _, lines, _ = compare(case, str(tmp_path))
    bad = []
    for ln in lines:
        r = int(ln["row"])
        for key in ("kl", "kl_reverse"):
            g, w = num(ln[key]), exp[key][r]
            if abs(g - w) > 0.02 * w:
                bad.append(f"row {r}: {key} {g!r}, want {w!r} (rel err {(g - w) / w:.2e})")
    assert not bad, "\n".join(bad)


@pytest.mark.parametrize("dtype", DTYPES)
def test_large_vocab(tmp_path, dtype):
    rng = np.random.default_rng({"F32": 31, "F16": 32, "BF16": 33}[dtype])
    R, V = 6, 32003
    ref, cand = make_pair(rng, R, V, scale=2.5)
    tg = rng.integers(0, V, size=R)
    tg[2] = -1
    rp, cp = str(tmp_path / "ref.safetensors"), str(tmp_path / "cand.safetensors")
    write_file(rp, dtype, ref, tg)
    write_file(cp, dtype, cand, tg)
    case = Case(rp, cp, st_write.stored_f64(ref, dtype), st_write.stored_f64(cand, dtype),
                np.arange(R), np.zeros(R, int), R, tg)
    exp = reference_metrics(case.ref, case.cand, tg)
    header, lines, rep = compare(case, str(tmp_path))
    report(check_csv(case, header, lines, exp) + check_json(case, rep, exp))


def test_js(tmp_path):
    case = build_case(str(tmp_path), "offsets", "F32", True)
    exp = reference_metrics(case.ref, case.cand, case.targets)
    header, lines, rep = compare(case, str(tmp_path), "--js")
    m = case.counted
    report(check_csv(case, header, lines, exp, js=True)
           + check_aggregate(rep["candidates"][0]["js"], exp["js"][m], "js"))


def test_js_absent_without_flag(tmp_path):
    case = build_case(str(tmp_path), "rows", "F32", False)
    header, _, rep = compare(case, str(tmp_path))
    assert "js" not in header
    assert rep["candidates"][0].get("js") is None


@pytest.mark.parametrize("dtype", ["F32", "BF16"])
def test_vocab_prefix(tmp_path, dtype):
    """--vocab N: the first N columns of each file, both renormalised."""
    rng = np.random.default_rng(41)
    R, N = 20, 32
    ref = rng.normal(size=(R, 40)) * 2
    cand = np.concatenate([ref[:, :N] + rng.normal(size=(R, N)) * 0.2,
                           rng.normal(size=(R, 8)) * 2 + 3], axis=1)
    tg = rng.integers(0, N, size=R)
    rp, cp = str(tmp_path / "ref.safetensors"), str(tmp_path / "cand.safetensors")
    write_file(rp, dtype, ref, tg)
    write_file(cp, dtype, cand, tg)
    r64, c64 = st_write.stored_f64(ref, dtype)[:, :N], st_write.stored_f64(cand, dtype)[:, :N]
    case = Case(rp, cp, r64, c64, np.arange(R), np.zeros(R, int), R, tg)
    exp = reference_metrics(r64, c64, tg)
    header, lines, rep = compare(case, str(tmp_path), "--vocab", str(N))
    bad = check_json(case, rep, exp)
    bad = [b for b in bad if not b.startswith("reference.vocab")]  # N or 40: reported, not asserted
    report(check_csv(case, header, lines, exp) + bad)


def test_vocab_mismatch_needs_flag(tmp_path):
    rng = np.random.default_rng(42)
    rp, cp = str(tmp_path / "ref.safetensors"), str(tmp_path / "cand.safetensors")
    write_file(rp, "F32", rng.normal(size=(4, 40)))
    write_file(cp, "F32", rng.normal(size=(4, 48)))
    p = run("compare", rp, cp, "--json", str(tmp_path / "o.json"))
    assert p.returncode == 2 and not (tmp_path / "o.json").exists()


def test_bits(tmp_path):
    """--bits: every divergence (and, by our reading, entropy and nll) divided
    by ln 2; tv is a probability distance and stays unchanged."""
    case = build_case(str(tmp_path), "offsets", "F32", True)
    exp = reference_metrics(case.ref, case.cand, case.targets)
    header, lines, rep = compare(case, str(tmp_path), "--js", "--bits")
    report(check_csv(case, header, lines, exp, js=True, scale=LN2) + check_json(case, rep, exp, scale=LN2))


@pytest.mark.parametrize("dtype", ["F32", "BF16"])
def test_logits_forms(tmp_path, dtype):
    """`logits_form` = centered / logprobs give the same distribution as raw:
    the candidate is stored as log-softmax values, the reference centred."""
    rng = np.random.default_rng(51)
    R, V = 12, 64
    ref, cand = make_pair(rng, R, V)
    ref_c = ref - ref.max(axis=1, keepdims=True)
    cand_lp = scipy.special.log_softmax(cand, axis=1)
    rp, cp = str(tmp_path / "ref.safetensors"), str(tmp_path / "cand.safetensors")
    st_write.write(rp, {"logits": (dtype, ref_c)}, metadata={"model": "Wren-7", "logits_form": "centered"})
    st_write.write(cp, {"logits": (dtype, cand_lp)}, metadata={"model": "Wren-7-q4", "logits_form": "logprobs"})
    case = Case(rp, cp, st_write.stored_f64(ref_c, dtype), st_write.stored_f64(cand_lp, dtype),
                np.arange(R), np.zeros(R, int), R)
    exp = reference_metrics(case.ref, case.cand)
    header, lines, _ = compare(case, str(tmp_path))
    # the stored log-probabilities need not sum to exactly one after rounding;
    # renormalising them (log_softmax) is what "the same distribution" means.
    report(check_csv(case, header, lines, exp))


def cluster_ci(x, groups, z=1.96):
    """Cluster-robust 95% interval of the mean (ratio estimator, one cluster
    per prompt): var = G/(G-1) * sum_g (S_g - m n_g)^2 / (sum n_g)^2, the
    textbook sandwich form for a mean with clustered observations."""
    ids = np.unique(groups)
    G = len(ids)
    S = np.array([x[groups == g].sum() for g in ids])
    n = np.array([(groups == g).sum() for g in ids])
    m = S.sum() / n.sum()
    var = G / (G - 1) * np.sum((S - m * n) ** 2) / n.sum() ** 2
    h = z * math.sqrt(var)
    return m, m - h, m + h


def ci_pair(v):
    if isinstance(v, (list, tuple)) and len(v) == 2:
        return float(v[0]), float(v[1])
    if isinstance(v, dict):
        for lo, hi in (("lo", "hi"), ("low", "high"), ("lower", "upper")):
            if lo in v and hi in v:
                return float(v[lo]), float(v[hi])
    pytest.fail(f"ci95 has an unknown form: {v!r}")


@pytest.mark.parametrize("layout", ["offsets_many", "seq3d", "rows"])
def test_ci95_cluster_robust(tmp_path, layout):
    rng = np.random.default_rng(61)
    V = 30
    if layout == "offsets_many":
        lens = rng.integers(1, 26, size=40)
        offs = np.concatenate([[0], np.cumsum(lens)])
        R = int(offs[-1])
        prompt = np.repeat(np.arange(len(lens)), lens)
        ref = rng.normal(size=(R, V)) * 2
        lev = 10 ** rng.uniform(-2, 0, size=len(lens))[prompt][:, None]  # correlated within a prompt
        cand = ref + rng.normal(size=(R, V)) * lev
        rp, cp = str(tmp_path / "r.safetensors"), str(tmp_path / "c.safetensors")
        write_file(rp, "F32", ref, offsets=offs)
        write_file(cp, "F32", cand, offsets=offs)
        case = Case(rp, cp, st_write.stored_f64(ref, "F32"), st_write.stored_f64(cand, "F32"),
                    prompt, np.arange(R) - offs[prompt], len(lens))
    else:
        case = build_case(str(tmp_path), layout, "F32", False)
    exp = reference_metrics(case.ref, case.cand)
    _, _, rep = compare(case, str(tmp_path))
    agg = rep["candidates"][0]["kl"]
    lo, hi = ci_pair(agg["ci95"])
    m, wlo, whi = cluster_ci(exp["kl"], case.prompt)
    half = (whi - wlo) / 2
    # within 1%: z = 1.96 against 1.959964 differs by 2e-5; a t quantile or a
    # bootstrap would not pass, and that would be a change of method to discuss.
    assert close(agg["mean"], m)
    assert abs((lo + hi) / 2 - m) <= 0.01 * half, (lo, hi, wlo, whi)
    assert 0.99 * half <= (hi - lo) / 2 <= 1.01 * half, \
        f"half-width {(hi - lo) / 2!r}, cluster-robust {half!r} (ratio {(hi - lo) / 2 / half:.3f})"


@pytest.mark.parametrize("dtype", DTYPES)
def test_value_faults_are_counted(tmp_path, dtype):
    """NaN in a row, +inf logits, a candidate row all -inf: the row is skipped
    and counted, exit 0, aggregates over the rest stay finite."""
    rng = np.random.default_rng(71)
    R, V = 12, 20
    ref, cand = make_pair(rng, R, V)
    cand[1, 4] = np.nan
    ref[3, 7] = np.inf
    cand[5, :] = -np.inf
    ref[8, 0] = np.nan
    faulty = [1, 3, 5, 8]
    rp, cp = str(tmp_path / "ref.safetensors"), str(tmp_path / "cand.safetensors")
    write_file(rp, dtype, ref)
    write_file(cp, dtype, cand)
    r64, c64 = st_write.stored_f64(ref, dtype), st_write.stored_f64(cand, dtype)
    keep = np.setdiff1d(np.arange(R), faulty)
    exp = reference_metrics(r64[keep], c64[keep])
    out_csv, out_json = tmp_path / "o.csv", tmp_path / "o.json"
    p = run("compare", rp, cp, "--csv", out_csv, "--json", out_json, "--samples", SAMPLES)
    assert p.returncode == 0, p.stderr
    rep = read_json(out_json)
    c = rep["candidates"][0]
    sk = c.get("skipped_rows")
    assert count_of(sk) == len(faulty), f"skipped_rows {sk!r}, want {len(faulty)} rows {faulty}"
    # SPEC: "skipped, counted and listed". The list may be skipped_rows itself
    # or a separate `skipped` list of {row, file, fault, ...}.
    listing = sk if isinstance(sk, list) else c.get("skipped")
    assert isinstance(listing, list), f"no list of skipped rows (skipped_rows {sk!r}, skipped {c.get('skipped')!r})"
    listed = sorted(int(x["row"]) if isinstance(x, dict) else int(x) for x in listing)
    assert listed == faulty, f"skipped rows listed {listed}, want {faulty}"
    sides = {int(x["row"]): x.get("file") for x in listing if isinstance(x, dict)}
    if sides and all(sides.values()):
        want_sides = {1: "candidate", 3: "reference", 5: "candidate", 8: "reference"}
        assert sides == want_sides, f"skipped rows blamed on {sides}, want {want_sides}"
    assert c["positions"] == len(keep), f"positions {c['positions']}, want {len(keep)}"
    assert math.isfinite(c["kl"]["mean"]) and close(c["kl"]["mean"], float(exp["kl"].mean()))
    assert c.get("infinite_kl") == 0
    _, lines = read_csv(out_csv)
    assert sorted(int(ln["row"]) for ln in lines) == list(keep)


def softmax64(x):
    return np.exp(scipy.special.log_softmax(x, axis=-1))  # scipy.special.log_softmax


def test_worst_positions_and_prompts(tmp_path):
    """worst_positions: the --top N largest kl, in descending order, with the
    right row/prompt/position, target, and top tokens whose p match scipy;
    worst_prompts: per-prompt mean and max of kl (numpy)."""
    case = build_case(str(tmp_path), "offsets", "F32", True)
    exp = reference_metrics(case.ref, case.cand, case.targets)
    _, _, rep = compare(case, str(tmp_path), "--top", "5")
    c = rep["candidates"][0]
    counted = np.flatnonzero(case.counted)
    order = counted[np.argsort(-exp["kl"][counted], kind="stable")]
    wp = c["worst_positions"]
    assert len(wp) == 5, f"{len(wp)} worst positions with --top 5"
    assert [w["row"] for w in wp] == list(order[:5]), ([w["row"] for w in wp], list(order[:5]))
    p_all, q_all = softmax64(case.ref), softmax64(case.cand)
    for w in wp:
        r = w["row"]
        assert w["prompt"] == case.prompt[r] and w["position"] == case.position[r]
        assert close(w["kl"], exp["kl"][r])
        t = None if case.targets[r] < 0 else int(case.targets[r])
        assert w["target"] == t, (w["target"], t)
        for key, probs in (("ref_top", p_all[r]), ("cand_top", q_all[r])):
            lst = w[key]
            assert lst, f"{key} empty"
            ids = [e["id"] for e in lst]
            want_ids = list(np.argsort(-probs, kind="stable")[: len(lst)])
            assert ids == want_ids, (key, ids, want_ids)
            for e in lst:
                assert close(e["p"], probs[e["id"]]), (key, e, probs[e["id"]])
    # worst prompts, by mean kl over counted positions
    bad = []
    per = {}
    for r in counted:
        per.setdefault(int(case.prompt[r]), []).append(exp["kl"][r])
    for w in c["worst_prompts"]:
        v = np.array(per[w["prompt"]])
        if w["positions"] != len(v) or not close(w["kl_mean"], v.mean()) or not close(w["kl_max"], v.max()):
            bad.append(f"prompt {w['prompt']}: {w}, want positions {len(v)} mean {v.mean()} max {v.max()}")
    means = [w["kl_mean"] for w in c["worst_prompts"]]
    assert means == sorted(means, reverse=True), f"worst_prompts not by descending kl_mean: {means}"
    best = max(per, key=lambda g: np.mean(per[g]))
    assert c["worst_prompts"][0]["prompt"] == best
    assert not bad, "\n".join(bad)


def test_gates(tmp_path):
    """A failing gate exits 1 and still writes the reports; each gate's
    `value` is the statistic it limits (kl mean, kl p99, top-1 rate)."""
    case = build_case(str(tmp_path), "seq3d", "F32", False)
    exp = reference_metrics(case.ref, case.cand)
    kl = exp["kl"]
    mean, p99 = float(kl.mean()), float(np.percentile(kl, 99, method="linear"))
    top1 = float(exp["top1_agree"].mean())
    # all pass
    _, _, rep = compare(case, str(tmp_path), "--max-kl-mean", repr(mean * 2), "--max-kl-p99", repr(p99 * 2),
                        "--min-top1", repr(top1 / 2), rc=0)
    gates = {g["name"]: g for g in rep["candidates"][0]["gates"]}
    assert len(gates) == 3 and all(g["pass"] is True for g in gates.values()), gates
    values = sorted(g["value"] for g in gates.values())
    for want in (mean, p99, top1):
        assert any(close(v, want) for v in values), f"no gate value {want} in {values}"
    # one fails: exit 1, reports still written
    for f in ("out.csv", "out.json"):
        (tmp_path / f).unlink()
    _, lines, rep = compare(case, str(tmp_path), "--max-kl-mean", repr(mean / 2), rc=1)
    g = rep["candidates"][0]["gates"]
    assert len(g) == 1 and g[0]["pass"] is False and close(g[0]["value"], mean) and close(g[0]["limit"], mean / 2), g
    assert len(lines) == case.rows


def test_two_candidates(tmp_path):
    """compare REF C1 C2: one candidates[] entry per file, each against scipy."""
    case = build_case(str(tmp_path), "rows", "BF16", True)
    rng = np.random.default_rng(81)
    c2 = case.ref + rng.normal(size=case.ref.shape) * 0.5
    c2_path = str(tmp_path / "cand2.safetensors")
    write_file(c2_path, "F16", c2, case.targets, case.mask, tdtype="I32")
    out_json = tmp_path / "two.json"
    run("compare", case.ref_path, case.cand_path, c2_path, "--json", out_json, "--samples", SAMPLES,
        check_rc=0)
    rep = read_json(out_json)
    assert [c["path"] for c in rep["candidates"]] == [case.cand_path, c2_path]
    m = case.counted
    for cand_vals, c in ((case.cand, rep["candidates"][0]), (st_write.stored_f64(c2, "F16"), rep["candidates"][1])):
        exp = reference_metrics(case.ref, cand_vals, case.targets)
        bad = check_aggregate(c["kl"], exp["kl"][m], "kl")
        assert not bad, "\n".join(bad)
    assert rep["candidates"][1]["dtype"] == "F16"


def drop_timings(x):
    """The report without wall-clock values (keys naming seconds)."""
    if isinstance(x, dict):
        return {k: drop_timings(v) for k, v in x.items() if "second" not in k}
    if isinstance(x, list):
        return [drop_timings(v) for v in x]
    return x


def test_thread_count_does_not_change_results(tmp_path):
    """SPEC: the estimator draws are the same whatever the thread count; the
    exact metrics must not move either. Every report value except timings."""
    case = build_case(str(tmp_path), "offsets", "BF16", True)
    outs = []
    for n in ("1", "2", "3"):
        j, c = tmp_path / f"t{n}.json", tmp_path / f"t{n}.csv"
        run("compare", case.ref_path, case.cand_path, "--json", j, "--csv", c, "--samples", "1,16",
            "--seed", "7", "--threads", n, check_rc=0)
        rep = read_json(j)
        rep.pop("timing", None)
        rep.get("settings", {}).pop("threads", None)
        outs.append((drop_timings(rep), c.read_text()))
    for rep, text in outs[1:]:
        assert text == outs[0][1], "CSV differs between thread counts"
        assert rep == outs[0][0], "JSON differs between thread counts"
