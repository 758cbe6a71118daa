//! Per-row cost of the hot kernel functions at every instruction-set level
//! this CPU has: `cargo bench --bench kernel [-- COLS] [WORD ...]`, where a
//! WORD keeps only the levels and functions whose names contain it (so that
//! `perf stat` can count the cycles of one of them). The candidate is the
//! reference plus Gaussian noise of sd `KERNEL_NOISE` (default 0.1; the
//! `run.py` candidates use 0.1, 0.03 and 0.3): the fused pass's route, and
//! so its cost, depends on how far the two rows are apart.
//!
//! The `*_from_memory` rows cycle through `KERNEL_MANY` (default 128)
//! distinct row pairs, 64 MiB at 128k columns, more than the L3 caches of
//! the machines measured; 1,024 (512 MiB) gave the same times.
//!
//! Prints the fastest and the median of many timed repetitions (the fastest is
//! the least disturbed by other work on the machine), in microseconds per row
//! and in columns per nanosecond. No assertions: a benchmark, not a test.

use klgauge::kernel::buf::Aligned;
use klgauge::kernel::{self, Level, RowNorm};
use std::hint::black_box;
use std::time::Instant;

fn lcg(s: &mut u64) -> f64 {
    *s = s
        .wrapping_mul(6364136223846793005)
        .wrapping_add(1442695040888963407);
    ((*s >> 11) as f64) / ((1u64 << 53) as f64)
}

fn normal(s: &mut u64) -> f32 {
    let u1 = lcg(s).max(1e-300);
    let u2 = lcg(s);
    ((-2.0 * u1.ln()).sqrt() * (2.0 * std::f64::consts::PI * u2).cos()) as f32
}

/// Runs `f` in batches for about `budget` seconds; returns (min, median) seconds per call.
fn time(budget: f64, mut f: impl FnMut()) -> (f64, f64) {
    let reps = 60;
    let t0 = Instant::now();
    f();
    let one = t0.elapsed().as_secs_f64().max(1e-7);
    let per_batch = ((budget / reps as f64) / one).ceil().max(1.0) as usize;
    let mut v: Vec<f64> = (0..reps)
        .map(|_| {
            let t = Instant::now();
            for _ in 0..per_batch {
                f();
            }
            t.elapsed().as_secs_f64() / per_batch as f64
        })
        .collect();
    v.sort_by(f64::total_cmp);
    (v[0], v[reps / 2])
}

/// The engine's row: the reference normalised from its stored bytes (pulling
/// `ahead` toward the cache meanwhile), the candidate compared by the fused
/// pair pass.
fn engine_row(
    l: Level,
    rx: kernel::Row,
    ry: kernel::Row,
    ahead: kernel::Ahead,
    er: &mut [f32],
    br: &mut [f64],
    ps: &mut kernel::PairScratch,
) {
    let r = kernel::normalise_row_at(l, black_box(rx), er, br, ahead).unwrap();
    black_box(
        kernel::compare_pair(
            rx,
            black_box(ry),
            er,
            br,
            &r,
            ps,
            kernel::Ahead::NONE,
            &mut kernel::TvFold::default(),
        )
        .ok(),
    );
}

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let cols: usize = args.iter().find_map(|a| a.parse().ok()).unwrap_or(128_256);
    let words: Vec<&String> = args
        .iter()
        .filter(|a| a.parse::<usize>().is_err())
        .collect();
    let keep = |l: Level, f: &str| {
        let lw: Vec<_> = words
            .iter()
            .filter(|w| ["avx512", "avx2", "scalar"].contains(&w.as_str()))
            .collect();
        let fw: Vec<_> = words
            .iter()
            .filter(|w| !["avx512", "avx2", "scalar"].contains(&w.as_str()))
            .collect();
        (lw.is_empty() || lw.iter().any(|w| w.as_str() == l.name()))
            && (fw.is_empty() || fw.iter().any(|w| f.contains(w.as_str())))
    };
    let mut s = 5u64;
    let x: Vec<f32> = (0..cols).map(|_| 2.5 * normal(&mut s)).collect();
    // The candidate's noise (sd): KERNEL_NOISE, 0.1 by default.
    let noise: f32 = std::env::var("KERNEL_NOISE")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(0.1);
    let y: Vec<f32> = x.iter().map(|&v| v + noise * normal(&mut s)).collect();
    let bf: Vec<u8> = x
        .iter()
        .flat_map(|v| ((v.to_bits() >> 16) as u16).to_le_bytes())
        .collect();
    let hf: Vec<u8> = x
        .iter()
        .flat_map(|v| half::f16::from_f32(*v).to_bits().to_le_bytes())
        .collect();
    let mut er = Aligned::<f32>::zeroed(cols);
    let mut ec = Aligned::<f32>::zeroed(cols);
    let mut out = Aligned::<f32>::zeroed(cols);
    let mut blocks = vec![0f64; kernel::norm_blocks(cols)];
    println!(
        "kernel benchmark, {cols} columns; detected level {}",
        kernel::detected_level().name()
    );
    println!(
        "{:<8} {:<22} {:>10} {:>10} {:>9}",
        "level", "function", "min us", "median us", "col/ns"
    );
    let levels: Vec<Level> = [Level::Avx512, Level::Avx2, Level::Scalar]
        .into_iter()
        .filter(|&l| l <= kernel::detected_level())
        .collect();
    let budget = 0.4;
    for &l in &levels {
        let r: RowNorm = kernel::normalise_store_at(l, &x, &mut er, &mut blocks).unwrap();
        let c: RowNorm = kernel::normalise_store_at(l, &y, &mut ec, &mut blocks).unwrap();
        let mut rows: Vec<(&str, (f64, f64))> = Vec::new();
        let mut run = |name: &'static str, f: &mut dyn FnMut()| {
            if keep(l, name) {
                rows.push((name, time(budget, f)));
            }
        };
        run("decode_bf16", &mut || {
            kernel::decode_bf16_at(l, black_box(&bf), &mut out)
        });
        run("decode_f16", &mut || {
            kernel::decode_f16_at(l, black_box(&hf), &mut out)
        });
        run("scan_row", &mut || {
            black_box(kernel::scan_row_at(l, black_box(&x)));
        });
        run("normalise_store", &mut || {
            black_box(kernel::normalise_store_at(l, black_box(&x), &mut er, &mut blocks).ok());
        });
        let (er2, ec2) = (er.clone(), ec.clone());
        run("compare_stored", &mut || {
            black_box(kernel::compare_stored_at(
                l,
                black_box(&x),
                &y,
                &er2,
                &ec2,
                &r,
                &c,
            ));
        });
        // The engine's whole row: decode both rows, normalise both, compare,
        // with the engine's separate buffers (its cache footprint).
        let bfy: Vec<u8> = y
            .iter()
            .flat_map(|v| ((v.to_bits() >> 16) as u16).to_le_bytes())
            .collect();
        let (mut xr, mut xc, mut er3, mut ec3) = (
            Aligned::<f32>::zeroed(cols),
            Aligned::<f32>::zeroed(cols),
            Aligned::<f32>::zeroed(cols),
            Aligned::<f32>::zeroed(cols),
        );
        let (mut br, mut bc) = (
            vec![0f64; kernel::norm_blocks(cols)],
            vec![0f64; kernel::norm_blocks(cols)],
        );
        run("whole_row_bf16", &mut || {
            kernel::decode_bf16_at(l, black_box(&bf), &mut xr);
            let r = kernel::normalise_store_at(l, &xr, &mut er3, &mut br).unwrap();
            kernel::decode_bf16_at(l, black_box(&bfy), &mut xc);
            let c = kernel::normalise_store_at(l, &xc, &mut ec3, &mut bc).unwrap();
            black_box(kernel::compare_stored_at(l, &xr, &xc, &er3, &ec3, &r, &c));
        });
        // The engine's row now: the reference normalised from its stored
        // bytes, the candidate normalised inside the fused pair pass.
        let mut ps = kernel::PairScratch::new(cols);
        let (rx, ry) = (kernel::Row::Bf16(&bf), kernel::Row::Bf16(&bfy));
        let rr = kernel::normalise_row_at(l, rx, &mut er3, &mut br, kernel::Ahead::NONE).unwrap();
        let mut bw = vec![0f64; kernel::norm_blocks(cols)];
        let mut vb = Aligned::<f32>::zeroed(cols);
        run("compare_fused_bf16", &mut || {
            black_box(kernel::compare_fused_at(
                l,
                rx,
                ry,
                &er3,
                &br,
                &rr,
                &mut vb,
                &mut bw,
                kernel::Ahead::NONE,
                &mut kernel::TvFold::default(),
            ));
        });
        run("fused_row_bf16", &mut || {
            engine_row(l, rx, ry, kernel::Ahead::NONE, &mut er3, &mut br, &mut ps);
        });
        // The same, but each call takes the next of 128 distinct row pairs
        // (64 MiB of bf16 at 128k columns), so the rows come from memory as
        // in a real run rather than from the cache the previous call filled;
        // "ahead": the reference's pass pulls the candidate's row toward the
        // cache meanwhile, as the engine does where it reads from the map.
        let many: usize = std::env::var("KERNEL_MANY")
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(128);
        let (bigx, bigy): (Vec<u8>, Vec<u8>) = (bf.repeat(many), bfy.repeat(many));
        for (name, pull) in [("row_from_memory", false), ("row_from_memory_ahead", true)] {
            let mut at = 0usize;
            run(name, &mut || {
                let rb = 2 * cols;
                let (xb, yb) = (&bigx[at * rb..(at + 1) * rb], &bigy[at * rb..(at + 1) * rb]);
                at = (at + 1) % many;
                let ahead = if pull {
                    kernel::Ahead(yb)
                } else {
                    kernel::Ahead::NONE
                };
                let (rx, ry) = (kernel::Row::Bf16(xb), kernel::Row::Bf16(yb));
                engine_row(l, rx, ry, ahead, &mut er3, &mut br, &mut ps);
            });
        }
        // As the engine walks rows from memory: the reference's pass settles
        // the previous candidate's total variation (`normalise_settling`),
        // the candidate's pass leaves its own owed and pulls the next
        // reference row.
        {
            let mut at = 0usize;
            let mut fold = kernel::TvFold::default();
            let mut ps2 = kernel::PairScratch::new(cols);
            run("engine_from_memory", &mut || {
                let rb = 2 * cols;
                let next = (at + 1) % many;
                let (xb, yb) = (&bigx[at * rb..(at + 1) * rb], &bigy[at * rb..(at + 1) * rb]);
                let xn = &bigx[next * rb..(next + 1) * rb];
                at = next;
                let (rx, ry) = (kernel::Row::Bf16(xb), kernel::Row::Bf16(yb));
                let r = kernel::normalise_settling_at(
                    l,
                    rx,
                    &mut er3,
                    &mut br,
                    kernel::Ahead(yb),
                    &ps2,
                    &mut fold,
                )
                .unwrap();
                fold.settled = None;
                fold.defer = true;
                let got = kernel::compare_pair(
                    rx,
                    ry,
                    &er3,
                    &br,
                    &r,
                    &mut ps2,
                    kernel::Ahead(xn),
                    &mut fold,
                );
                if let Ok((f, _)) = got {
                    fold.owed = f.owed;
                }
                black_box(fold.settled.take());
            });
        }
        let rd = kernel::Rounding {
            mantissa_bits: 7,
            min_exp: -133,
        };
        run("storage_floor_row", &mut || {
            black_box(kernel::storage_floor_row_at(l, black_box(&x), rd, &y, rd));
        });
        // The floor as the streaming pass takes it, from the stored exponentials.
        run("storage_floor_stored", &mut || {
            black_box(kernel::storage_floor_stored_at(
                l,
                black_box(rx),
                rd,
                ry,
                rd,
                &er3,
                &rr,
            ));
        });
        // The default --samples 1,4,16: 16 draws from the reference's stored
        // exponentials (the sampler is not vectorised: one entry, any level).
        let mut ds = klgauge::estimators::DrawScratch::default();
        let mut toks = [0u32; 16];
        let mut seed = 0u64;
        run("draw_16", &mut || {
            seed += 1;
            klgauge::estimators::draw_weighted(
                klgauge::estimators::Stored::One(&er3),
                cols,
                black_box(&br),
                seed,
                7,
                0,
                &mut ds,
                &mut toks,
            );
            black_box(&toks);
        });
        for (name, (mn, med)) in rows {
            println!(
                "{:<8} {:<22} {:>10.1} {:>10.1} {:>9.2}",
                l.name(),
                name,
                mn * 1e6,
                med * 1e6,
                cols as f64 / (mn * 1e9)
            );
        }
    }
}
