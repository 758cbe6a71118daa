//! `klgauge inspect`: layout listing, notes, exit codes, and the storage
//! floor checked against a direct simulation of rounding.

mod common;

use common::*;
use half::bf16;
use safetensors::tensor::Dtype;
use serde_json::Value;
use std::collections::HashMap;
use std::path::Path;

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn inspect_json(p: &Path, dir: &Path) -> Value {
    let j = dir.join("inspect.json");
    let out = klgauge(&["inspect", s(p), "--json", s(&j)]);
    assert_eq!(
        out.status.code(),
        Some(0),
        "stderr: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    json(&j)
}

fn notes(v: &Value) -> Vec<String> {
    v["notes"]
        .as_array()
        .unwrap()
        .iter()
        .map(|n| n.as_str().unwrap().to_string())
        .collect()
}

/// KL(p||q) of two f64 logit rows, by log-softmax with max subtraction (the
/// textbook definition; common practice).
fn kl_f64(x: &[f64], y: &[f64]) -> f64 {
    let lsm = |v: &[f64]| -> Vec<f64> {
        let m = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        let s: f64 = v.iter().map(|&b| (b - m).exp()).sum();
        v.iter().map(|&b| b - m - s.ln()).collect()
    };
    let (lp, lq) = (lsm(x), lsm(y));
    lp.iter().zip(&lq).map(|(a, b)| a.exp() * (a - b)).sum()
}

fn bf16_round(v: f64) -> f64 {
    bf16::from_f64(v).to_f64()
}

/// Raw logits around 22 (sd 1.2, in bf16's [16, 32) range, where its spacing is
/// 2^-3): the floor is about (1/2) * 2 * (2^-3)^2 / 12 * (1 - sum p^2),
/// near 1e-3 nats. The simulation: a copy of the same logits shifted by a
/// constant c ~ U[0, 2) has exactly the same distribution (softmax is
/// shift-invariant) but is rounded differently, so KL(bf16(z) || bf16(z + c)),
/// computed in f64, is pure rounding; its average over rows and shifts is the
/// floor being estimated.
#[test]
fn raw_bf16_floor_matches_a_direct_simulation() {
    let d = tempdir::Dir::new();
    let (rows, vocab) = (200usize, 2000usize);
    let mut rng = Rng(41);
    // Kept inside [16, 30) so that z and z + c (c < 2) share bf16's spacing;
    // the clamp at the bottom touches only tokens of negligible probability.
    let z: Vec<f64> = (0..rows * vocab)
        .map(|_| (22.0 + 1.2 * rng.normal()).max(16.5))
        .collect();
    assert!(z.iter().all(|&v| v < 29.9));
    let stored: Vec<f32> = z.iter().map(|&v| v as f32).collect();
    let raw = d.path().join("raw.safetensors");
    let mut meta = HashMap::new();
    meta.insert("model".to_string(), "Wren-7 (base)".to_string());
    write(
        &raw,
        vec![("logits", floats(Dtype::BF16, &[rows, vocab], &stored))],
        Some(meta.clone()),
    );

    let mut sim = 0.0;
    let shifts = 8;
    for r in 0..rows {
        let row = &z[r * vocab..(r + 1) * vocab];
        let a: Vec<f64> = row.iter().map(|&v| bf16_round(v)).collect();
        for _ in 0..shifts {
            let c = 2.0 * rng.uniform();
            let b: Vec<f64> = row.iter().map(|&v| bf16_round(v + c)).collect();
            sim += kl_f64(&a, &b);
        }
    }
    sim /= (rows * shifts) as f64;

    let v = inspect_json(&raw, d.path());
    let floor = v["storage_floor"]["nats"].as_f64().unwrap();
    println!(
        "raw bf16 floor: model {floor:.4e} nats, simulation {sim:.4e} nats, ratio {:.3}",
        floor / sim
    );
    assert!(
        floor / sim < 1.5 && sim / floor < 1.5,
        "model {floor} vs simulation {sim}"
    );
    assert!(
        (3e-4..3e-3).contains(&floor),
        "floor {floor} is not near 1e-3"
    );
    assert_eq!(v["values"]["looks"], "raw");
    assert_eq!(v["storage_floor"]["dtype"], "BF16");
    let n = notes(&v);
    assert!(
        n.iter()
            .any(|x| x.contains("raw (uncentered) logits stored in BF16")),
        "{n:?}"
    );
    assert!(n.iter().any(|x| x.contains("no prompt grouping")), "{n:?}");
    assert!(n.iter().any(|x| x.contains("no targets")), "{n:?}");
    let centered_hint = v["storage_floor"]["if_centered"].as_f64().unwrap();

    // The same rows stored minus their maximum: far smaller floor.
    // The stored bf16 values minus their row maximum: multiples of 2^-3 below
    // 16 in magnitude, exact in bf16, so this file holds the same distributions.
    let centered: Vec<f32> = stored
        .chunks(vocab)
        .flat_map(|row| {
            let r: Vec<f64> = row.iter().map(|&v| bf16_round(v as f64)).collect();
            let m = r.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
            r.into_iter()
                .map(move |v| (v - m) as f32)
                .collect::<Vec<_>>()
        })
        .collect();
    assert!(centered.iter().all(|&v| bf16_round(v as f64) == v as f64));
    let cen = d.path().join("centered.safetensors");
    let mut meta_c = meta.clone();
    meta_c.insert("logits_form".into(), "centered".into());
    write(
        &cen,
        vec![("logits", floats(Dtype::BF16, &[rows, vocab], &centered))],
        Some(meta_c),
    );
    let vc = inspect_json(&cen, d.path());
    let fc = vc["storage_floor"]["nats"].as_f64().unwrap();
    println!("centered bf16 floor: {fc:.4e} nats ({:.0}x smaller); hint from the raw file {centered_hint:.4e}", floor / fc);
    assert!(fc < floor / 30.0, "centered floor {fc} vs raw {floor}");
    assert_eq!(vc["values"]["looks"], "centered");
    assert!(vc["storage_floor"]["if_centered"].is_null());
    assert!(
        !notes(&vc)
            .iter()
            .any(|x| x.contains("raw (uncentered)") || x.contains("logits_form")),
        "{:?}",
        notes(&vc)
    );
    // The hint given for the raw file is the floor of this centered twin (to
    // the odd value that rounds differently through f64 here and f32 in the writer).
    assert!(
        (centered_hint / fc - 1.0).abs() < 1e-4,
        "{centered_hint} vs {fc}"
    );
}

#[test]
fn lists_tensors_layout_and_metadata() {
    let d = tempdir::Dir::new();
    let (seqs, len, vocab) = (6usize, 5usize, 40usize);
    let mut rng = Rng(3);
    let x: Vec<f32> = (0..seqs * len * vocab)
        .map(|_| (2.0 * rng.normal()) as f32)
        .collect();
    let t: Vec<i64> = (0..seqs * len).map(|i| (i % vocab) as i64).collect();
    let m: Vec<u8> = (0..seqs * len)
        .map(|i| u8::from(i % len != len - 1))
        .collect();
    let p = d.path().join("three.safetensors");
    let mut meta = HashMap::new();
    meta.insert("model".to_string(), "Wren-7 int4".to_string());
    meta.insert("logits_form".to_string(), "raw".to_string());
    write(
        &p,
        vec![
            ("logits", floats(Dtype::F32, &[seqs, len, vocab], &x)),
            ("targets", i64s(&[seqs, len], &t)),
            ("mask", u8s(&[seqs, len], &m)),
            ("extra", i64s(&[2], &[1, 2])),
        ],
        Some(meta),
    );
    let v = inspect_json(&p, d.path());
    assert_eq!(v["schema"], "klgauge-inspect/1");
    assert_eq!(v["kind"], "logits");
    let tensors = v["files"][0]["tensors"].as_array().unwrap();
    let names: Vec<&str> = tensors
        .iter()
        .map(|t| t["name"].as_str().unwrap())
        .collect();
    assert_eq!(names, vec!["extra", "logits", "mask", "targets"]);
    let lg = tensors.iter().find(|t| t["name"] == "logits").unwrap();
    assert_eq!(lg["dtype"], "F32");
    assert_eq!(lg["shape"], serde_json::json!([6, 5, 40]));
    assert_eq!(lg["bytes"], (seqs * len * vocab * 4) as u64);
    let l = &v["logits"];
    assert_eq!(l["rows"], 30);
    assert_eq!(l["vocab"], 40);
    assert_eq!(l["prompts"], 6);
    assert_eq!(l["grouping"], "sequences");
    assert_eq!(l["targets"], true);
    assert_eq!(l["mask"]["padding"], 6);
    assert_eq!(v["metadata"]["model"], "Wren-7 int4");
    let n = notes(&v);
    assert!(
        n.iter()
            .any(|x| x.contains("`extra` is not part of the layout")),
        "{n:?}"
    );
    assert!(
        n.iter().any(|x| x.contains("6 of 30 rows as padding")),
        "{n:?}"
    );
    assert!(
        !n.iter().any(|x| x.contains("no prompt grouping")
            || x.contains("no targets")
            || x.contains("raw (uncentered)")),
        "{n:?}"
    );
    // F32 has a negligible floor.
    assert!(v["storage_floor"]["nats"].as_f64().unwrap() < 1e-10);
    // Value statistics agree with the data (masked rows excluded from the sample).
    let counted: Vec<f32> = x
        .chunks(vocab)
        .enumerate()
        .filter(|(i, _)| i % len != len - 1)
        .flat_map(|(_, r)| r.to_vec())
        .collect();
    let max = counted.iter().cloned().fold(f32::NEG_INFINITY, f32::max) as f64;
    assert_eq!(v["values"]["max"].as_f64().unwrap(), max);
    assert_eq!(v["values"]["rows_sampled"], 24);
    // The terminal summary shows the tensors and the notes.
    let out = klgauge(&["inspect", s(&p)]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("logits") && text.contains("[6, 5, 40]") && text.contains("notes:"),
        "{text}"
    );
}

#[test]
fn shards_logprob_files_and_declared_forms() {
    let d = tempdir::Dir::new();
    // A directory of two shards with offsets.
    let dir = d.path().join("shards");
    std::fs::create_dir(&dir).unwrap();
    let vocab = 30;
    for (k, rows) in [(0usize, 4usize), (1, 6)] {
        let x: Vec<f32> = (0..rows * vocab)
            .map(|i| ((i * 37 % 11) as f32) * 0.3)
            .collect();
        write(
            &dir.join(format!("part-{k}.safetensors")),
            vec![
                ("logits", floats(Dtype::F32, &[rows, vocab], &x)),
                ("prompt_offsets", i64s(&[3], &[0, 2, rows as i64])),
            ],
            None,
        );
    }
    let v = inspect_json(&dir, d.path());
    assert_eq!(v["files"].as_array().unwrap().len(), 2);
    assert_eq!(v["logits"]["rows"], 10);
    assert_eq!(v["logits"]["prompts"], 4);
    assert_eq!(v["logits"]["grouping"], "offsets");
    assert!(notes(&v).iter().any(|x| x.contains("no `model`")));

    // Declared logprobs, but the rows are raw: a note, exit 0.
    let p = d.path().join("declared.safetensors");
    let mut meta = HashMap::new();
    meta.insert("logits_form".to_string(), "logprobs".to_string());
    write(
        &p,
        vec![(
            "logits",
            floats(Dtype::F32, &[2, 3], &[5.0, 6.0, 7.0, 1.0, 2.0, 3.0]),
        )],
        Some(meta),
    );
    let v = inspect_json(&p, d.path());
    assert!(
        notes(&v)
            .iter()
            .any(|x| x.contains("logits_form = logprobs")),
        "{:?}",
        notes(&v)
    );
    // Real log-probabilities are recognised.
    let lsm = |r: [f64; 3]| {
        let l = r.iter().map(|v| v.exp()).sum::<f64>().ln();
        r.map(|v| (v - l) as f32)
    };
    let rows: Vec<f32> = [lsm([5.0, 6.0, 7.0]), lsm([1.0, 2.0, 3.0])].concat();
    let p2 = d.path().join("lp-rows.safetensors");
    write(
        &p2,
        vec![("logits", floats(Dtype::F32, &[2, 3], &rows))],
        None,
    );
    assert_eq!(inspect_json(&p2, d.path())["values"]["looks"], "logprobs");

    // A log-probability file.
    let lp = d.path().join("draws.safetensors");
    write(
        &lp,
        vec![
            (
                "logprob_ref",
                floats(Dtype::F32, &[4], &[-1.0, -2.0, -0.5, -3.0]),
            ),
            (
                "logprob_cand",
                floats(Dtype::F32, &[4], &[-1.1, f32::NEG_INFINITY, -0.4, -2.0]),
            ),
            ("tokens", i64s(&[4], &[3, 1, 4, 1])),
        ],
        Some(HashMap::from([
            ("model_ref".to_string(), "Wren-7".to_string()),
            ("model_cand".to_string(), "Wren-7 int4".to_string()),
        ])),
    );
    let v = inspect_json(&lp, d.path());
    assert_eq!(v["kind"], "logprobs");
    assert!(
        !notes(&v)
            .iter()
            .any(|x| x.contains("not part of the layout") || x.contains("no `model`")),
        "{:?}",
        notes(&v)
    );
    assert_eq!(v["logprobs"]["draws"], 4);
    assert_eq!(v["logprobs"]["infinite"], 1);
    assert_eq!(v["logprobs"]["logprob_ref"]["min"].as_f64().unwrap(), -3.0);
    assert!(v["storage_floor"].is_null());
}

#[test]
fn invalid_files_exit_2_with_the_validation_message() {
    let d = tempdir::Dir::new();
    let good: Vec<f32> = (0..12).map(|i| i as f32).collect();
    // (case name, tensors in the file, what the error must mention)
    type Case<'a> = (&'a str, Vec<(&'a str, T)>, &'a str);
    let cases: Vec<Case> = vec![
        (
            "no-logits",
            vec![("scores", floats(Dtype::F32, &[3, 4], &good))],
            "neither `logits`",
        ),
        (
            "int-logits",
            vec![("logits", i64s(&[3, 4], &[0; 12]))],
            "expected F32, F16 or BF16",
        ),
        (
            "bad-offsets",
            vec![
                ("logits", floats(Dtype::F32, &[3, 4], &good)),
                ("prompt_offsets", i64s(&[3], &[0, 2, 2])),
            ],
            "strictly increasing",
        ),
        (
            "bad-targets",
            vec![
                ("logits", floats(Dtype::F32, &[3, 4], &good)),
                ("targets", i64s(&[4], &[0; 4])),
            ],
            "`targets` has shape",
        ),
        (
            "target-range",
            vec![
                ("logits", floats(Dtype::F32, &[3, 4], &good)),
                ("targets", i64s(&[3], &[0, 4, 1])),
            ],
            "outside the vocabulary",
        ),
        (
            "lp-lengths",
            vec![
                ("logprob_ref", floats(Dtype::F32, &[3], &[-1.0; 3])),
                ("logprob_cand", floats(Dtype::F32, &[2], &[-1.0; 2])),
            ],
            "pair up",
        ),
    ];
    for (name, tensors, needle) in cases {
        let p = d.path().join(format!("{name}.safetensors"));
        write(&p, tensors, None);
        let j = d.path().join(format!("{name}.json"));
        let out = klgauge(&["inspect", s(&p), "--json", s(&j)]);
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{name}: {err}");
        assert!(err.contains(s(&p)) && err.contains(needle), "{name}: {err}");
        assert_eq!(err.trim().lines().count(), 1, "{name}: {err}");
        assert!(!j.exists(), "{name}: no report written");
    }
    // A truncated file: the header promises more bytes than there are.
    let p = d.path().join("cut.safetensors");
    write(
        &p,
        vec![("logits", floats(Dtype::F32, &[3, 4], &good))],
        None,
    );
    let bytes = std::fs::read(&p).unwrap();
    std::fs::write(&p, &bytes[..bytes.len() - 10]).unwrap();
    let out = klgauge(&["inspect", s(&p)]);
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains(s(&p)));
}
