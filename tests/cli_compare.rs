//! Integration tests of `klgauge compare`: every option, the exit codes and
//! the CSV and JSON keys that SPEC fixes.

mod common;

use common::*;
use safetensors::tensor::Dtype;
use serde_json::Value;

fn run_ok(args: &[&str]) -> std::process::Output {
    let out = klgauge(args);
    assert_eq!(
        out.status.code(),
        Some(0),
        "stderr: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    out
}

fn s(p: &std::path::Path) -> &str {
    p.to_str().unwrap()
}

/// Removes fields that legitimately differ between runs (timing).
fn strip_timing(mut v: Value) -> Value {
    v.as_object_mut().unwrap().remove("timing");
    for c in v["candidates"].as_array_mut().unwrap() {
        c["sampling_cost"]
            .as_object_mut()
            .unwrap()
            .remove("exact_pass_seconds");
    }
    v
}

#[test]
fn json_has_every_spec_key() {
    let p = random_pair(40, 300, 8, 0.2, 1);
    let j = p.dir.path().join("r.json");
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--json",
        s(&j),
        "--max-kl-mean",
        "1",
    ]);
    let v = json(&j);
    assert_eq!(v["schema"], "klgauge-report/1");
    assert_eq!(v["units"], "nats");
    for k in ["path", "dtype", "rows", "vocab", "prompts"] {
        assert!(!v["reference"][k].is_null(), "reference.{k}");
    }
    assert_eq!(v["reference"]["rows"], 40);
    assert_eq!(v["reference"]["vocab"], 300);
    assert_eq!(v["reference"]["prompts"], 8);
    let c = &v["candidates"][0];
    for k in [
        "path",
        "dtype",
        "positions",
        "kl",
        "kl_reverse",
        "tv",
        "entropy_ref",
        "entropy_cand",
        "nll_ref",
        "nll_cand",
        "top1_agree",
        "ppl_ref",
        "ppl_cand",
        "ppl_ratio",
        "skipped_rows",
        "infinite_kl",
        "storage_floor",
        "estimators",
        "worst_positions",
        "worst_prompts",
        "gates",
    ] {
        assert!(c.get(k).is_some(), "candidates[0].{k} missing");
    }
    assert!(c.get("js").is_none(), "js only with --js");
    for m in [
        "kl",
        "kl_reverse",
        "tv",
        "entropy_ref",
        "entropy_cand",
        "nll_ref",
        "nll_cand",
    ] {
        for k in ["mean", "ci95", "p50", "p90", "p99", "p999", "max"] {
            assert!(c[m].get(k).is_some(), "{m}.{k} missing");
        }
    }
    let e = &c["estimators"][0];
    for k in ["direction", "samples_per_position"] {
        assert!(e.get(k).is_some());
    }
    for kk in ["k1", "k2", "k3"] {
        for k in ["mean", "bias", "std", "rmse", "positions_for_10pct"] {
            assert!(e[kk].get(k).is_some(), "{kk}.{k}");
        }
    }
    let w = &c["worst_positions"][0];
    for k in [
        "row", "prompt", "position", "kl", "target", "ref_top", "cand_top",
    ] {
        assert!(w.get(k).is_some(), "worst_positions.{k}");
    }
    assert!(w["ref_top"][0].get("id").is_some() && w["ref_top"][0].get("p").is_some());
    for k in ["prompt", "positions", "kl_mean", "kl_max"] {
        assert!(c["worst_prompts"][0].get(k).is_some());
    }
    for k in ["name", "limit", "value", "pass"] {
        assert!(c["gates"][0].get(k).is_some());
    }
    // The per-position kl of the worst position matches an f64 computation.
    let row = w["row"].as_u64().unwrap() as usize;
    let (x, y) = (
        &p.x[row * 300..(row + 1) * 300],
        &p.y[row * 300..(row + 1) * 300],
    );
    let want = kl_f64(x, y);
    let got = w["kl"].as_f64().unwrap();
    assert!((got - want).abs() <= 1e-4 * want, "{got} vs {want}");
}

#[test]
fn csv_has_spec_header_and_one_line_per_position() {
    let p = random_pair(30, 200, 5, 0.3, 2);
    let c = p.dir.path().join("pos.csv");
    let j = p.dir.path().join("r.json");
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--csv",
        s(&c),
        "--json",
        s(&j),
    ]);
    let text = std::fs::read_to_string(&c).unwrap();
    let mut lines = text.lines();
    assert_eq!(lines.next().unwrap(), "row,prompt,position,target,kl,kl_reverse,tv,top1_agree,entropy_ref,entropy_cand,nll_ref,nll_cand");
    let rows: Vec<Vec<String>> = lines
        .map(|l| l.split(',').map(String::from).collect())
        .collect();
    assert_eq!(rows.len(), 30);
    let mut sum = 0.0;
    for (i, r) in rows.iter().enumerate() {
        assert_eq!(r[0], i.to_string());
        assert_eq!(r[3], p.targets[i].to_string());
        let kl: f64 = r[4].parse().unwrap();
        let want = kl_f64(&p.x[i * 200..(i + 1) * 200], &p.y[i * 200..(i + 1) * 200]);
        assert!(
            (kl - want).abs() <= 1e-4 * want.max(1e-3),
            "row {i}: {kl} vs {want}"
        );
        sum += kl;
    }
    // Prompt 1 starts at row 6 (offsets i*30/5): position counts from 0 within it.
    assert_eq!(rows[6][1], "1");
    assert_eq!(rows[6][2], "0");
    let mean = json(&j)["candidates"][0]["kl"]["mean"].as_f64().unwrap();
    assert!((mean - sum / 30.0).abs() < 1e-9 * mean);
}

#[test]
fn gates_set_the_exit_code_and_reports_are_still_written() {
    let p = random_pair(20, 100, 4, 0.3, 3);
    let j = p.dir.path().join("r.json");
    let out = klgauge(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--json",
        s(&j),
        "--max-kl-mean",
        "1e-9",
    ]);
    assert_eq!(out.status.code(), Some(1));
    let v = json(&j);
    assert_eq!(v["candidates"][0]["gates"][0]["pass"], false);
    assert!(String::from_utf8_lossy(&out.stdout).contains("FAIL"));
    let out = klgauge(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--min-top1",
        "1.01",
    ]);
    assert_eq!(out.status.code(), Some(1));
    let out = klgauge(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--max-kl-p99",
        "100",
        "--max-kl-mean",
        "100",
        "--min-top1",
        "0",
    ]);
    assert_eq!(out.status.code(), Some(0));
}

#[test]
fn bad_usage_exits_2() {
    let p = random_pair(4, 10, 2, 0.3, 4);
    assert_eq!(
        klgauge(&["compare", s(&p.reference)]).status.code(),
        Some(2)
    );
    assert_eq!(
        klgauge(&[
            "compare",
            s(&p.reference),
            s(&p.candidate),
            "--threads",
            "0"
        ])
        .status
        .code(),
        Some(2)
    );
    assert_eq!(
        klgauge(&["compare", s(&p.reference), s(&p.candidate), "--vocab", "11"])
            .status
            .code(),
        Some(2)
    );
    assert_eq!(
        klgauge(&[
            "compare",
            s(&p.reference),
            s(&p.candidate),
            "--shard",
            "3/2"
        ])
        .status
        .code(),
        Some(2)
    );
    assert_eq!(klgauge(&["frobnicate"]).status.code(), Some(2));
    let missing = p.dir.path().join("nope.safetensors");
    let out = klgauge(&["compare", s(&p.reference), s(&missing)]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("nope.safetensors"));
    // A report into a missing directory is refused, and nothing is left behind.
    let bad = p.dir.path().join("no-such-dir").join("r.json");
    assert_eq!(
        klgauge(&[
            "compare",
            s(&p.reference),
            s(&p.candidate),
            "--json",
            s(&bad)
        ])
        .status
        .code(),
        Some(2)
    );
}

#[test]
fn bits_divides_by_ln2() {
    let p = random_pair(16, 64, 4, 0.5, 5);
    let (a, b) = (p.dir.path().join("a.json"), p.dir.path().join("b.json"));
    run_ok(&["compare", s(&p.reference), s(&p.candidate), "--json", s(&a)]);
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--json",
        s(&b),
        "--bits",
    ]);
    let (a, b) = (json(&a), json(&b));
    assert_eq!(b["units"], "bits");
    let ln2 = std::f64::consts::LN_2;
    for m in ["kl", "kl_reverse", "entropy_ref", "nll_cand"] {
        let (x, y) = (
            a["candidates"][0][m]["mean"].as_f64().unwrap(),
            b["candidates"][0][m]["mean"].as_f64().unwrap(),
        );
        assert!((x / ln2 - y).abs() < 1e-12 * y.abs(), "{m}");
    }
    // Perplexity and total variation have no unit.
    assert_eq!(a["candidates"][0]["ppl_ref"], b["candidates"][0]["ppl_ref"]);
    assert_eq!(
        a["candidates"][0]["tv"]["mean"],
        b["candidates"][0]["tv"]["mean"]
    );
}

#[test]
fn vocab_compares_the_first_columns_renormalised() {
    let p = random_pair(6, 50, 2, 0.4, 6);
    let c = p.dir.path().join("p.csv");
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--vocab",
        "20",
        "--csv",
        s(&c),
        "--samples",
        "0",
    ]);
    let text = std::fs::read_to_string(&c).unwrap();
    for (i, line) in text.lines().skip(1).enumerate() {
        let f: Vec<&str> = line.split(',').collect();
        let want = kl_f64(&p.x[i * 50..i * 50 + 20], &p.y[i * 50..i * 50 + 20]);
        let got: f64 = f[4].parse().unwrap();
        assert!((got - want).abs() <= 1e-4 * want, "{got} vs {want}");
        // Targets outside the first 20 columns have no nll.
        if p.targets[i] >= 20 {
            assert_eq!(f[10], "");
        }
    }
}

#[test]
fn js_adds_a_column_and_an_aggregate() {
    let p = random_pair(8, 40, 2, 0.4, 7);
    let (c, j) = (p.dir.path().join("p.csv"), p.dir.path().join("r.json"));
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--js",
        "--csv",
        s(&c),
        "--json",
        s(&j),
    ]);
    let text = std::fs::read_to_string(&c).unwrap();
    assert!(text.lines().next().unwrap().ends_with(",js"));
    let v = json(&j);
    let js = v["candidates"][0]["js"]["mean"].as_f64().unwrap();
    let kl = v["candidates"][0]["kl"]["mean"].as_f64().unwrap();
    // JS is bounded by ln 2 and, for close distributions, about a quarter of KL
    // (second-order expansion: JS ~ KL/4; common practice).
    assert!(js > 0.0 && js < std::f64::consts::LN_2 && js < kl);
}

#[test]
fn top_lists_the_worst_positions_in_order() {
    let p = random_pair(50, 30, 10, 0.5, 8);
    let j = p.dir.path().join("r.json");
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--top",
        "7",
        "--json",
        s(&j),
    ]);
    let v = json(&j);
    let w = v["candidates"][0]["worst_positions"].as_array().unwrap();
    assert_eq!(w.len(), 7);
    let kls: Vec<f64> = w.iter().map(|x| x["kl"].as_f64().unwrap()).collect();
    assert!(kls.windows(2).all(|k| k[0] >= k[1]));
    assert_eq!(
        w[0]["kl"].as_f64().unwrap(),
        v["candidates"][0]["kl"]["max"].as_f64().unwrap()
    );
    assert_eq!(w[0]["ref_top"].as_array().unwrap().len(), 5);
    assert!(
        v["candidates"][0]["worst_prompts"]
            .as_array()
            .unwrap()
            .len()
            <= 7
    );
}

#[test]
fn thread_count_does_not_change_the_report() {
    let p = random_pair(300, 500, 30, 0.2, 9);
    let (a, b) = (p.dir.path().join("a.json"), p.dir.path().join("b.json"));
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--threads",
        "1",
        "--json",
        s(&a),
        "--seed",
        "5",
    ]);
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--threads",
        "3",
        "--json",
        s(&b),
        "--seed",
        "5",
    ]);
    assert_eq!(strip_timing(json(&a)), strip_timing(json(&b)));
}

#[test]
fn samples_and_seed_shape_the_estimator_blocks() {
    let p = random_pair(40, 100, 8, 0.3, 10);
    let (a, b, c) = (
        p.dir.path().join("a.json"),
        p.dir.path().join("b.json"),
        p.dir.path().join("c.json"),
    );
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--samples",
        "2,8",
        "--seed",
        "1",
        "--json",
        s(&a),
    ]);
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--samples",
        "2,8",
        "--seed",
        "1",
        "--json",
        s(&b),
    ]);
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--samples",
        "2,8",
        "--seed",
        "2",
        "--json",
        s(&c),
    ]);
    let (a, b, c) = (json(&a), json(&b), json(&c));
    let e = a["candidates"][0]["estimators"].as_array().unwrap();
    assert_eq!(e.len(), 4);
    let budgets: Vec<u64> = e
        .iter()
        .map(|x| x["samples_per_position"].as_u64().unwrap())
        .collect();
    assert_eq!(budgets, vec![2, 2, 8, 8]);
    assert_eq!(
        a["candidates"][0]["estimators"],
        b["candidates"][0]["estimators"]
    );
    assert_ne!(
        a["candidates"][0]["estimators"],
        c["candidates"][0]["estimators"]
    );
}

#[test]
fn several_candidates_share_one_pass() {
    let p = random_pair(20, 60, 4, 0.2, 11);
    let (c, j) = (p.dir.path().join("p.csv"), p.dir.path().join("r.json"));
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        s(&p.reference),
        "--csv",
        s(&c),
        "--json",
        s(&j),
    ]);
    let v = json(&j);
    assert_eq!(v["candidates"].as_array().unwrap().len(), 2);
    // The reference compared with itself has zero divergence.
    assert_eq!(v["candidates"][1]["kl"]["max"].as_f64().unwrap(), 0.0);
    assert_eq!(v["candidates"][1]["top1_agree"].as_f64().unwrap(), 1.0);
    let cmp = &v["comparisons"][0];
    assert_eq!(cmp["verdict"], "b lower");
    let text = std::fs::read_to_string(&c).unwrap();
    assert!(text.starts_with("candidate,row,"));
    assert_eq!(text.lines().count(), 1 + 40);
}

#[test]
fn three_d_layout_with_mask_and_shards() {
    let dir = tempdir::Dir::new();
    let (seqs, len, vocab) = (4usize, 5usize, 30usize);
    let mut r = Rng(12);
    let x: Vec<f32> = (0..seqs * len * vocab).map(|_| r.normal() as f32).collect();
    let y: Vec<f32> = x.iter().map(|&v| v + 0.3 * r.normal() as f32).collect();
    let mask: Vec<u8> = (0..seqs * len).map(|i| (i % len < 4) as u8).collect();
    let (rp, cp) = (
        dir.path().join("r.safetensors"),
        dir.path().join("c.safetensors"),
    );
    write(
        &rp,
        vec![
            ("logits", floats(Dtype::BF16, &[seqs, len, vocab], &x)),
            ("mask", u8s(&[seqs, len], &mask)),
        ],
        None,
    );
    write(
        &cp,
        vec![("logits", floats(Dtype::BF16, &[seqs, len, vocab], &y))],
        None,
    );
    let j = dir.path().join("r.json");
    run_ok(&["compare", s(&rp), s(&cp), "--json", s(&j)]);
    let v = json(&j);
    assert_eq!(v["reference"]["prompts"], 4);
    assert_eq!(v["candidates"][0]["positions"], 16);
    assert_eq!(v["candidates"][0]["dtype"], "BF16");
    assert!(v["candidates"][0]["nll_ref"].is_null());

    // The same rows split over two shard files in a directory give the same numbers.
    let (rd, cd) = (dir.path().join("rd"), dir.path().join("cd"));
    std::fs::create_dir_all(&rd).unwrap();
    std::fs::create_dir_all(&cd).unwrap();
    let half = seqs / 2 * len * vocab;
    for (d, v, m) in [(&rd, &x, true), (&cd, &y, false)] {
        for (i, part) in [&v[..half], &v[half..]].iter().enumerate() {
            let mut t = vec![("logits", floats(Dtype::BF16, &[seqs / 2, len, vocab], part))];
            if m {
                let mm = &mask[i * (seqs / 2) * len..(i + 1) * (seqs / 2) * len];
                t.push(("mask", u8s(&[seqs / 2, len], mm)));
            }
            write(&d.join(format!("part-{i:05}.safetensors")), t, None);
        }
    }
    let j2 = dir.path().join("r2.json");
    run_ok(&["compare", s(&rd), s(&cd), "--json", s(&j2)]);
    let w = json(&j2);
    assert_eq!(w["reference"]["prompts"], 4);
    assert_eq!(v["candidates"][0]["kl"], w["candidates"][0]["kl"]);
}

#[test]
fn tokenizer_gives_token_text() {
    let p = random_pair(6, 5, 2, 0.5, 13);
    let tok = p.dir.path().join("tokenizer.json");
    std::fs::write(&tok, r#"{"model":{"type":"BPE","vocab":{"a":0,"b":1,"\u0120harbor":2,"d":3,"e":4}},"added_tokens":[]}"#).unwrap();
    let j = p.dir.path().join("r.json");
    run_ok(&[
        "compare",
        s(&p.reference),
        s(&p.candidate),
        "--tokenizer",
        s(&tok),
        "--json",
        s(&j),
    ]);
    let v = json(&j);
    let texts: Vec<String> = v["candidates"][0]["worst_positions"][0]["ref_top"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| t["text"].as_str().unwrap().to_string())
        .collect();
    assert!(texts.contains(&" harbor".to_string()), "{texts:?}");
}

#[test]
fn infinite_kl_is_counted_not_dropped() {
    let dir = tempdir::Dir::new();
    let x = vec![0.0f32, 1.0, 2.0, 0.5, 0.5, 0.5];
    let y = vec![f32::NEG_INFINITY, 1.0, 2.0, 0.4, 0.5, 0.6];
    let (rp, cp) = (
        dir.path().join("r.safetensors"),
        dir.path().join("c.safetensors"),
    );
    write(&rp, vec![("logits", floats(Dtype::F32, &[2, 3], &x))], None);
    write(&cp, vec![("logits", floats(Dtype::F32, &[2, 3], &y))], None);
    let (j, c) = (dir.path().join("r.json"), dir.path().join("p.csv"));
    let out = klgauge(&[
        "compare",
        s(&rp),
        s(&cp),
        "--json",
        s(&j),
        "--csv",
        s(&c),
        "--max-kl-mean",
        "1",
    ]);
    assert_eq!(
        out.status.code(),
        Some(1),
        "an infinite mean fails a kl gate"
    );
    let v = json(&j);
    assert_eq!(v["candidates"][0]["infinite_kl"], 1);
    assert_eq!(v["candidates"][0]["positions"], 2);
    let text = std::fs::read_to_string(&c).unwrap();
    assert!(text.lines().nth(1).unwrap().split(',').nth(4).unwrap() == "inf");
}

#[test]
fn nan_rows_are_skipped_and_listed() {
    let dir = tempdir::Dir::new();
    let x = vec![0.0f32, 1.0, 2.0, 0.5, 0.5, 0.5, 1.0, 1.0, 1.0];
    let y = vec![0.1f32, 1.0, 2.0, 0.5, f32::NAN, 0.5, 1.0, 1.0, 1.1];
    let (rp, cp) = (
        dir.path().join("r.safetensors"),
        dir.path().join("c.safetensors"),
    );
    write(&rp, vec![("logits", floats(Dtype::F32, &[3, 3], &x))], None);
    write(&cp, vec![("logits", floats(Dtype::F32, &[3, 3], &y))], None);
    let j = dir.path().join("r.json");
    run_ok(&["compare", s(&rp), s(&cp), "--json", s(&j)]);
    let v = json(&j);
    let c = &v["candidates"][0];
    assert_eq!(c["skipped_rows"], 1);
    assert_eq!(c["skipped"][0]["row"], 1);
    assert_eq!(c["positions"], 2);
    assert!(c["kl"]["mean"].as_f64().unwrap().is_finite());
}
