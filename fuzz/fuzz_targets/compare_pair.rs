//! One fuzz input = options and two logit files: `[split: u16 LE][options: u8]
//! [reference bytes][candidate bytes]`, the reference taking `split` bytes.
//! When both open, the whole comparison runs (engine, report, JSON and text)
//! and every counted position must hold sane numbers.
#![no_main]

use klgauge::engine::{self, EngineOptions, PositionSink, PositionValues, KL, KL_REV, TV};
use klgauge::input::LogitFile;
use klgauge::report::{self, BuildInputs, Format, GateLimits};
use libfuzzer_sys::fuzz_target;

/// Above this logit magnitude the kernel's f32 arithmetic (x - lse in f32)
/// is known to lose the normalisation, so only "no panic" is checked there.
/// Found by this target; see the ignored test in tests/faults.rs.
const PRECISE_UP_TO: f32 = 1.0e4;

struct Check {
    numbers: bool,
}

impl PositionSink for Check {
    fn position(&mut self, _: usize, row: usize, _: usize, _: usize, _: Option<i64>, v: &PositionValues) -> klgauge::error::Result<()> {
        if !self.numbers {
            return Ok(());
        }
        let m = &v.m;
        // Divergences are sums of non-negative terms: never negative, never NaN
        // (+inf is allowed where one side gives zero probability).
        assert!(m[KL] >= 0.0, "row {row}: kl {}", m[KL]);
        assert!(m[KL_REV] >= 0.0, "row {row}: kl_reverse {}", m[KL_REV]);
        assert!((0.0..=1.0 + 1e-5).contains(&m[TV]), "row {row}: tv {}", m[TV]);
        Ok(())
    }
}

fn write(tag: &str, data: &[u8]) -> std::path::PathBuf {
    let p = std::env::temp_dir().join(format!("klgauge-fuzz-pair-{}-{tag}.safetensors", std::process::id()));
    std::fs::write(&p, data).unwrap();
    p
}

fuzz_target!(|data: &[u8]| {
    if data.len() < 3 {
        return;
    }
    let split = (u16::from_le_bytes([data[0], data[1]]) as usize).min(data.len() - 3);
    let opts = data[2];
    let body = &data[3..];
    let (a, b) = body.split_at(split);
    let (pa, pb) = (write("ref", a), write("cand", b));
    let (Ok(r), Ok(c)) = (LogitFile::open(&pa), LogitFile::open(&pb)) else {
        return;
    };
    let vocab = if opts & 1 != 0 { Some(1 + (opts as usize >> 4)) } else { None };
    let samples = if opts & 2 != 0 { vec![1, 3] } else { vec![] };
    let cands = vec![c];
    let Ok(aligned) = engine::align(&r, &cands, vocab) else {
        return;
    };
    let (cols, targets) = (aligned.cols, aligned.targets);
    let eo = EngineOptions {
        js: opts & 4 != 0,
        samples: samples.clone(),
        seed: opts as u64,
        top: 3,
        rows: None,
        block_rows: 4,
        progress: false,
    };
    let largest = |f: &LogitFile| {
        let mut row = vec![0f32; cols];
        (0..f.rows).fold(0f32, |m, i| {
            f.read_row(i, &mut row);
            row.iter().filter(|x| x.is_finite()).fold(m, |m, x| m.max(x.abs()))
        })
    };
    let numbers = largest(&r).max(largest(&cands[0])) <= PRECISE_UP_TO;
    let res = engine::run(&r, &cands, &aligned, &eo, &mut Check { numbers }).expect("validated inputs run");
    let inputs = BuildInputs {
        reference: &r,
        candidates: &cands,
        cols,
        bits: opts & 8 != 0,
        samples,
        seed: opts as u64,
        top: 3,
        js: opts & 4 != 0,
        shard: None,
        gates: GateLimits { max_kl_mean: Some(0.1), max_kl_p99: Some(1.0), min_top1: Some(0.5) },
        vocabulary: None,
        targets,
    };
    let rep = report::build(&inputs, res);
    report::json::Json.write(&rep, &mut std::io::sink()).unwrap();
    report::text::Text.write(&rep, &mut std::io::sink()).unwrap();
});
