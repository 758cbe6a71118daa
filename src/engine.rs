//! The comparison engine: streams rows of the reference and every candidate
//! through the kernel in parallel blocks and folds the results, in row order,
//! into per-candidate accumulators.
//!
//! Rows are processed in blocks: each block is computed in parallel (rayon),
//! then reduced sequentially in row order. The reduction order is therefore
//! the same for 1 or 16 threads, and memory outside the maps is bounded by the
//! block plus the per-position values kept for exact percentiles.

use crate::error::{Error, Result};
use crate::estimators::{draw_weighted, k_values, EstimatorSums, Stored};
use crate::input::LogitFile;
use crate::kernel::buf::Aligned;
use crate::kernel::{self, Ahead, Row, RowFault, RowNorm};
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use std::ops::Range;

/// Metric slots in per-prompt sums and per-position value arrays.
pub const KL: usize = 0;
pub const KL_REV: usize = 1;
pub const TV: usize = 2;
pub const JS: usize = 3;
pub const ENT_REF: usize = 4;
pub const ENT_CAND: usize = 5;
pub const NLL_REF: usize = 6;
pub const NLL_CAND: usize = 7;
pub const TOP1: usize = 8;
pub const NMETRIC: usize = 9;

#[derive(Debug, Clone)]
pub struct EngineOptions {
    pub js: bool,
    /// Draws per position for each estimator block, e.g. [1, 4, 16]. Blocks are
    /// nested: the first n draws of the largest budget.
    pub samples: Vec<usize>,
    pub seed: u64,
    pub top: usize,
    /// Rows to process (a shard); None = all.
    pub rows: Option<Range<usize>>,
    /// Rows computed in parallel before they are folded in row order
    /// (`BLOCK_ROWS`; results do not depend on it).
    pub block_rows: usize,
    pub progress: bool,
    /// Whether finished rows are dropped from the page cache behind the
    /// pass; None: decided by `drops_behind`.
    pub drop_behind: Option<bool>,
}

/// Rows per block. Each block ends with both workers waiting for the
/// slower one's last task; at 64 rows that was about 10% of a bf16 128k run
/// on two threads, at 256 rows it is a few percent (measured side by side:
/// 0.104-0.110 s against 0.118-0.135 s for 2,048 rows).
pub const BLOCK_ROWS: usize = 256;

impl Default for EngineOptions {
    fn default() -> Self {
        EngineOptions {
            js: false,
            samples: vec![1, 4, 16],
            seed: 0,
            top: 20,
            rows: None,
            block_rows: BLOCK_ROWS,
            progress: false,
            drop_behind: None,
        }
    }
}

/// Everything known about one counted position, handed to a `PositionSink`.
#[derive(Debug, Clone, Copy)]
pub struct PositionValues {
    /// Indexed by the metric slots above; NaN where a value does not exist.
    pub m: [f64; NMETRIC],
}

/// Receives every counted position in row order (the CSV writer).
pub trait PositionSink {
    fn position(
        &mut self,
        cand: usize,
        row: usize,
        prompt: usize,
        position: usize,
        target: Option<i64>,
        v: &PositionValues,
    ) -> Result<()>;
}

/// Per-prompt sums: everything behind every mean and interval.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct PromptSums {
    pub prompt: u64,
    /// Counted positions.
    pub n: f64,
    /// Counted positions with a target.
    pub n_target: f64,
    pub sum: [f64; NMETRIC],
    pub max_kl: f64,
}

impl PromptSums {
    fn new(prompt: u64) -> PromptSums {
        PromptSums {
            prompt,
            n: 0.0,
            n_target: 0.0,
            sum: [0.0; NMETRIC],
            max_kl: f64::NEG_INFINITY,
        }
    }
    /// Number of positions a metric's sum runs over.
    pub fn count(&self, metric: usize) -> f64 {
        if metric == NLL_REF || metric == NLL_CAND {
            self.n_target
        } else {
            self.n
        }
    }
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct SkippedRow {
    pub row: u64,
    pub prompt: u64,
    pub position: u64,
    /// "reference" or "candidate".
    pub file: String,
    pub fault: String,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct WorstPosition {
    pub row: u64,
    pub prompt: u64,
    pub position: u64,
    pub kl: f64,
    pub target: Option<i64>,
}

/// The most likely tokens of both models at one row, (id, probability),
/// most likely first.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct RowTops {
    pub reference: Vec<(u32, f64)>,
    pub candidate: Vec<(u32, f64)>,
}

/// Tokens listed per model at each worst position.
pub const TOP_TOKENS: usize = 5;

/// Most skipped rows listed individually; the count is always exact.
pub const SKIPPED_LISTED: usize = 1000;

/// Everything one candidate's run produced.
#[derive(Debug, Clone, Default)]
pub struct CandidateAccum {
    pub positions: u64,
    pub prompts: Vec<PromptSums>,
    /// Per metric, the value of every counted position (for exact percentiles).
    pub values: Vec<Vec<f64>>,
    pub worst: Vec<WorstPosition>,
    /// The top tokens of both models at rows of `worst`, taken during the
    /// pass where its files are dropped from the page cache behind it (see
    /// `run`); rows not here are read again for them after the pass.
    pub worst_tops: HashMap<u64, RowTops>,
    pub skipped_rows: u64,
    pub skipped: Vec<SkippedRow>,
    pub infinite_kl: u64,
    /// [budget][direction]
    pub estimators: Vec<[EstimatorSums; 2]>,
    /// Log-spaced histogram of kl (plots; mergeable).
    pub kl_hist: crate::histo::KlHistogram,
    /// kl binned by position index within the prompt (plots; mergeable).
    pub by_position: crate::histo::PositionProfile,
    /// Per-prompt tail counts behind the interval of kl's percentiles (mergeable).
    pub kl_tail: crate::histo::TailSums,
    /// The storage floor summed over the floor's sampled rows that were
    /// counted (`floor::sample_rows`), and their number.
    pub floor_sum: f64,
    pub floor_rows: u64,
}

/// Paired kl differences (a - b) per prompt, over positions counted in both.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct PairAccum {
    pub a: usize,
    pub b: usize,
    /// (prompt, n, sum of kl_a - kl_b)
    pub prompts: Vec<(u64, f64, f64)>,
}

#[derive(Debug, Default)]
pub struct EngineResult {
    pub candidates: Vec<CandidateAccum>,
    pub pairs: Vec<PairAccum>,
    /// Seconds spent in the exact pass.
    pub seconds: f64,
    pub rows_processed: u64,
}

/// The columns compared: the common vocabulary or `--vocab`.
pub fn compared_columns(
    reference: &LogitFile,
    candidates: &[LogitFile],
    vocab: Option<usize>,
) -> Result<usize> {
    match vocab {
        Some(0) => Err(Error::usage("--vocab must be at least 1")),
        Some(n) => {
            for f in std::iter::once(reference).chain(candidates) {
                if f.vocab < n {
                    return Err(Error::input(
                        &f.path,
                        format!(
                            "has a vocabulary of {} columns, fewer than --vocab {n}",
                            f.vocab
                        ),
                    ));
                }
            }
            Ok(n)
        }
        None => {
            for c in candidates {
                if c.vocab != reference.vocab {
                    return Err(Error::input(
                        &c.path,
                        format!("vocabulary {} differs from the reference's {} (use --vocab N to compare the first N columns)", c.vocab, reference.vocab),
                    ));
                }
            }
            Ok(reference.vocab)
        }
    }
}

/// Checks that the candidates line up with the reference (SPEC: same rows,
/// identical targets when both carry them) and returns the targets to use.
pub fn check_alignment<'a>(
    reference: &'a LogitFile,
    candidates: &'a [LogitFile],
) -> Result<Option<&'a [i64]>> {
    // The first file that carries targets sets them; every other file that
    // carries them must agree (also between candidates when the reference has none).
    let mut targets: Option<(&[i64], &LogitFile)> =
        reference.targets.as_deref().map(|t| (t, reference));
    for c in candidates {
        if c.rows != reference.rows {
            return Err(Error::input(
                &c.path,
                format!(
                    "has {} rows, the reference {} has {}",
                    c.rows,
                    reference.path.display(),
                    reference.rows
                ),
            ));
        }
        match (targets, c.targets.as_deref()) {
            (Some((a, owner)), Some(b)) => {
                if let Some(i) = a.iter().zip(b).position(|(x, y)| x != y) {
                    let whose = if std::ptr::eq(owner, reference) {
                        "the reference's".to_string()
                    } else {
                        format!("those of {}", owner.path.display())
                    };
                    return Err(Error::input(
                        &c.path,
                        format!("`targets` differ from {whose} at row {i} ({} vs {}): the dumps are not aligned", b[i], a[i]),
                    ));
                }
            }
            (None, Some(b)) => targets = Some((b, c)),
            _ => {}
        }
        // Explicit prompt boundaries on both sides must agree: different ones
        // mean the files were cut from different prompt sets.
        let explicit = |f: &LogitFile| !matches!(f.grouping, crate::input::Grouping::PerRow);
        if explicit(reference) && explicit(c) && c.prompt_starts != reference.prompt_starts {
            let (a, b) = (&reference.prompt_starts, &c.prompt_starts);
            let i = a
                .iter()
                .zip(b)
                .position(|(x, y)| x != y)
                .unwrap_or(a.len().min(b.len()));
            let at = |v: &[usize]| {
                v.get(i).map_or("does not exist".to_string(), |r| {
                    format!("starts at row {r}")
                })
            };
            return Err(Error::input(
                &c.path,
                format!("prompt boundaries differ from the reference's: prompt {i} {} here, {} there; the dumps are not aligned", at(b), at(a)),
            ));
        }
    }
    let targets = targets.map(|(t, _)| t);
    if let Some(t) = targets {
        let vocab = reference.vocab.min(
            candidates
                .iter()
                .map(|c| c.vocab)
                .min()
                .unwrap_or(usize::MAX),
        );
        if let Some(i) = t.iter().position(|&v| v >= vocab as i64) {
            let owner = if reference.targets.is_some() {
                reference
            } else {
                candidates.iter().find(|c| c.targets.is_some()).unwrap()
            };
            return Err(Error::input(
                &owner.path,
                format!(
                    "`targets` row {i} holds token {} outside the vocabulary of {vocab}",
                    t[i]
                ),
            ));
        }
    }
    Ok(targets)
}

/// What `run` needs to know about inputs that passed validation: the columns
/// compared and the targets to use.
#[derive(Debug, Clone, Copy)]
pub struct Alignment<'a> {
    pub cols: usize,
    pub targets: Option<&'a [i64]>,
}

/// Validates that the candidates line up with the reference and fixes the
/// compared columns (`--vocab` or the common vocabulary).
pub fn align<'a>(
    reference: &'a LogitFile,
    candidates: &'a [LogitFile],
    vocab: Option<usize>,
) -> Result<Alignment<'a>> {
    let cols = compared_columns(reference, candidates, vocab)?;
    let targets = check_alignment(reference, candidates)?;
    Ok(Alignment { cols, targets })
}

/// The estimator budgets in force: sorted, without duplicates or zeros.
pub fn budgets(samples: &[usize]) -> Vec<usize> {
    let mut s = samples.to_vec();
    s.sort_unstable();
    s.dedup();
    s.retain(|&n| n > 0);
    s
}

/// Per-candidate results of one row.
#[derive(Debug, Clone)]
struct CandOut {
    fault: Option<RowFault>,
    m: [f64; NMETRIC],
    /// [budget][direction][k]
    est: Vec<[[f64; 3]; 2]>,
    /// The storage floor of a sampled row, else NaN.
    floor: f64,
}

#[derive(Debug, Clone)]
struct RowOut {
    counted: bool,
    ref_fault: Option<RowFault>,
    cands: Vec<CandOut>,
}

/// Per-thread working memory, allocated once per run and reused for every row.
struct Scratch {
    cols: usize,
    /// The stored bytes of the reference row and of the current candidate row.
    raw_r: Aligned<u8>,
    raw_c: Aligned<u8>,
    /// exp(x - max) of the reference row, and its block sums.
    er: Aligned<f32>,
    br: Vec<f64>,
    pair: kernel::PairScratch,
    /// Decoded rows, for the opt-in Jensen-Shannon pass only.
    xd: Vec<f32>,
    yd: Vec<f32>,
    order: crate::estimators::DrawScratch,
    tok_p: Vec<u32>,
    tok_q: Vec<u32>,
    /// The total variation this worker's last row left owed (see
    /// `compute_row`).
    carry: Carry,
    /// Total variations settled for earlier rows since the block began:
    /// (row, candidate, value), put into the block's results after it.
    settled: Vec<(usize, usize, f64)>,
}

impl Scratch {
    fn new(cols: usize, draws: usize) -> Scratch {
        Scratch {
            cols,
            raw_r: Aligned::zeroed(0),
            raw_c: Aligned::zeroed(0),
            er: Aligned::zeroed(cols),
            br: vec![0.0; kernel::norm_blocks(cols)],
            pair: kernel::PairScratch::new(cols),
            xd: Vec::new(),
            yd: Vec::new(),
            order: Default::default(),
            tok_p: vec![0; draws],
            tok_q: vec![0; draws],
            carry: Carry::default(),
            settled: Vec::new(),
        }
    }
}

struct RowCtx<'a> {
    reference: &'a LogitFile,
    candidates: &'a [LogitFile],
    targets: Option<&'a [i64]>,
    opts: &'a EngineOptions,
    draws: usize,
    /// The storage floor's sampled rows, ascending.
    floor_rows: &'a [usize],
}

/// log q(t) - log p(t) for token t, in f64.
#[inline]
fn log_ratio(xr: Row, nr: &RowNorm, xc: Row, nc: &RowNorm, t: u32) -> f64 {
    (xc.get(t as usize) as f64 - nc.lse) - (xr.get(t as usize) as f64 - nr.lse)
}

/// Fills `est[b][dir]` with the mean k-values of the first samples[b] draws.
fn fold_draws(
    est: &mut [[[f64; 3]; 2]],
    dir: usize,
    samples: &[usize],
    mut log_r: impl FnMut(usize) -> f64,
) {
    let mut acc = [0f64; 3];
    let mut done = 0usize;
    for (b, &n) in samples.iter().enumerate() {
        while done < n {
            let k = k_values(log_r(done));
            for i in 0..3 {
                acc[i] += k[i];
            }
            done += 1;
        }
        for i in 0..3 {
            est[b][dir][i] = acc[i] / n as f64;
        }
    }
}

/// A total variation one row's pass left to the next pass over the same
/// buffers (see `kernel::TvFold`), and whose it is: candidate `cand` of
/// `row`.
#[derive(Default)]
struct Carry {
    fold: kernel::TvFold,
    row: usize,
    cand: usize,
}

/// Computes one row into `out`. Each kernel pass pulls the row of the
/// candidate compared next toward the cache while it runs (where that file
/// is read from the map; see `LogitFile::ahead`), and the last comparison
/// pulls the next reference row, which this worker most often takes next
/// (its task's second row, or the next task's first). That measured no gain
/// on the first AVX-512 machines; on one whose loops run twice as fast
/// (Zen 5), where a row's trip from memory weighs more, 1.050x and 1.047x
/// on two threads, 1.059x and 0.997x on one, 1.035x and 1.031x with three
/// candidates (`builds_ab.py --as-read-from-disk`, two runs of 10 rounds).
///
/// A candidate's total variation is summed by the next pass that streams
/// the same buffers (`kernel::TvFold`): the next candidate's, or, for the
/// last candidate, the normalising pass of the next row this worker takes
/// (`s.carry`). What the previous row left there is settled by this row's
/// first pass, whatever happens to this row, into `s.settled`; what is
/// still owed when a block ends is summed on its own (`settle_block`).
/// Which rows a worker takes does not change a bit of the results: a
/// folded sum has the bits of the pass on its own.
fn compute_row(ctx: &RowCtx, s: &mut Scratch, row: usize, out: &mut RowOut) {
    let Scratch {
        cols,
        raw_r,
        raw_c,
        er,
        br,
        pair,
        xd,
        yd,
        order,
        tok_p,
        tok_q,
        carry,
        settled,
    } = s;
    let cols = *cols;
    let xr = ctx.reference.stored_row(row, cols, raw_r);
    let ahead = |k: usize| match ctx.candidates.get(k) {
        Some(c) => c.ahead(row, cols),
        None if row + 1 < ctx.reference.rows => ctx.reference.ahead(row + 1, cols),
        None => Ahead::NONE,
    };
    let fold = &mut carry.fold;
    let got = kernel::normalise_settling(xr, er, br, ahead(0), pair, fold);
    if let Some(tv) = fold.settled.take() {
        settled.push((carry.row, carry.cand, tv));
    }
    carry.row = row;
    let nr = match got {
        Ok(n) => n,
        Err(f) => {
            out.ref_fault = Some(f);
            return;
        }
    };
    out.ref_fault = None;
    let draws = ctx.draws;
    if draws > 0 {
        // The weights are the exponentials the kernel stored.
        draw_weighted(
            Stored::One(er),
            cols,
            br,
            ctx.opts.seed,
            row as u64,
            0,
            order,
            &mut tok_p[..draws],
        );
    }
    if ctx.opts.js {
        xd.resize(cols, 0.0);
        kernel::decode(xr, xd);
    }
    let target = ctx
        .targets
        .map(|t| t[row])
        .filter(|&t| t >= 0 && (t as usize) < cols);
    let floor_row = ctx.floor_rows.binary_search(&row).is_ok();
    for (k, cand) in ctx.candidates.iter().enumerate() {
        let xc = cand.stored_row(row, cols, raw_c);
        // The candidate is normalised inside the pair pass (see `kernel::compare_pair`).
        fold.defer = true;
        let got = kernel::compare_pair(xr, xc, er, br, &nr, pair, ahead(k + 1), fold);
        if let Some(tv) = fold.settled.take() {
            out.cands[carry.cand].m[TV] = tv;
        }
        let co = &mut out.cands[k];
        let (f, route) = match got {
            Ok(v) => v,
            Err(fault) => {
                co.fault = Some(fault);
                continue;
            }
        };
        if let Some(o) = f.owed {
            (fold.owed, carry.cand) = (Some(o), k);
        }
        co.fault = None;
        co.floor = if floor_row {
            crate::floor::stored_row_floor(xr, ctx.reference.dtype, xc, cand.dtype, er, &nr)
        } else {
            f64::NAN
        };
        let (pm, nc) = (f.m, f.c);
        let m = &mut co.m;
        m[KL] = pm.kl;
        m[KL_REV] = pm.kl_reverse;
        m[TV] = pm.tv;
        m[JS] = if ctx.opts.js {
            yd.resize(cols, 0.0);
            kernel::decode(xc, yd);
            kernel::js_divergence(xd, yd, &nr, &nc)
        } else {
            f64::NAN
        };
        m[ENT_REF] = nr.entropy;
        m[ENT_CAND] = nc.entropy;
        m[TOP1] = if nr.argmax == nc.argmax { 1.0 } else { 0.0 };
        match target {
            Some(t) => {
                m[NLL_REF] = nr.lse - xr.get(t as usize) as f64;
                m[NLL_CAND] = nc.lse - xc.get(t as usize) as f64;
            }
            None => {
                m[NLL_REF] = f64::NAN;
                m[NLL_CAND] = f64::NAN;
            }
        }
        if draws > 0 {
            let tp = &*tok_p;
            fold_draws(&mut co.est, 0, &ctx.opts.samples, |j| {
                log_ratio(xr, &nr, xc, &nc, tp[j])
            });
            draw_weighted(
                pair.weights(er, route),
                cols,
                &pair.blocks,
                ctx.opts.seed,
                row as u64,
                1 + k as u64,
                order,
                &mut tok_q[..draws],
            );
            let tq = &*tok_q;
            // Reverse: x ~ q, log r' = log p(x) - log q(x).
            fold_draws(&mut co.est, 1, &ctx.opts.samples, |j| {
                -log_ratio(xr, &nr, xc, &nc, tq[j])
            });
        }
    }
}

/// Puts the total variations a block's rows left to later passes into
/// its results (`outs`, from row `row0`), summing on their own those still
/// owed (see `compute_row`).
fn settle_block(scratch: &[std::sync::Mutex<Scratch>], row0: usize, outs: &mut [RowOut]) {
    for m in scratch {
        let mut g = m.lock().unwrap_or_else(|e| e.into_inner());
        let s = &mut *g;
        if let Some(o) = s.carry.fold.owed.take() {
            let tv = s.pair.settle(&s.er, o);
            s.settled.push((s.carry.row, s.carry.cand, tv));
        }
        for (row, k, tv) in s.settled.drain(..) {
            outs[row - row0].cands[k].m[TV] = tv;
        }
    }
}

/// Rows per block for this run: `want` (`BLOCK_ROWS` unless a test asks
/// otherwise through `KLGAUGE_BLOCK_ROWS`), and where the files cannot stay
/// cached (`room`, see `input::room`) no more than a quarter of that room
/// holds, at least 16. A block's rows stay in the page cache until it is
/// folded while the next block is read, with the kernel's read-ahead
/// beyond: at 256 rows that is 262 MB with three candidates at 128k bf16,
/// which a 256 MiB memory limit cannot hold, and reclaim then takes pages
/// the pass has still to read. Results do not depend on the block size
/// (tested).
fn block_rows(want: usize, row_bytes: usize, room: Option<u64>) -> usize {
    let want = std::env::var("KLGAUGE_BLOCK_ROWS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(want)
        .max(1);
    match room {
        Some(room) if row_bytes > 0 => {
            let fit = (room / 4 / row_bytes as u64).max(16) as usize;
            want.min(fit)
        }
        _ => want,
    }
}

/// Whether a run streaming `streamed` bytes drops its finished rows from
/// the page cache: where they exceed the `room` it has there (see
/// `input::room`), or as the environment variable `KLGAUGE_DROP_BEHIND`
/// (`always`, `never`) says, for tests and benchmarks.
fn drops_behind(streamed: u64, room: Option<u64>) -> bool {
    match std::env::var("KLGAUGE_DROP_BEHIND").as_deref() {
        Ok("always") => true,
        Ok("never") => false,
        _ => room.is_some_and(|room| streamed > room),
    }
}

/// Rows counted at all: not masked out in any file.
fn counted(row: usize, files: &[&LogitFile]) -> bool {
    files.iter().all(|f| f.mask.as_ref().is_none_or(|m| m[row]))
}

pub fn run(
    reference: &LogitFile,
    candidates: &[LogitFile],
    aligned: &Alignment,
    opts: &EngineOptions,
    sink: &mut dyn PositionSink,
) -> Result<EngineResult> {
    if candidates.is_empty() {
        return Err(Error::usage("compare needs at least one candidate file"));
    }
    let Alignment { cols, targets } = *aligned;
    let samples = budgets(&opts.samples);
    let opts = &EngineOptions {
        samples: samples.clone(),
        ..opts.clone()
    };
    let draws = samples.last().copied().unwrap_or(0);
    let range = opts.rows.clone().unwrap_or(0..reference.rows);
    let prompt_of = reference.prompt_of_rows();
    let files: Vec<&LogitFile> = std::iter::once(reference)
        .chain(candidates.iter())
        .collect();
    // Files that cannot all stay in the page cache are dropped from it
    // behind the pass (see `input::room`).
    let row_bytes: usize = files.iter().map(|f| f.row_len_bytes()).sum();
    let streamed = (range.len() * row_bytes) as u64;
    let room = crate::input::room::cache_room();
    let drop_behind = opts
        .drop_behind
        .unwrap_or_else(|| drops_behind(streamed, room));
    // Each file's read-ahead may take a quarter of the room's share per file.
    let ahead_room = room.map_or(u64::MAX, |r| r / 4 / files.len() as u64);
    for f in &files {
        f.set_drop_behind(drop_behind, ahead_room);
    }
    let block = block_rows(opts.block_rows, row_bytes, room.filter(|_| drop_behind));
    let nc = candidates.len();
    // Every file has the reference's rows (checked by `align`).
    let floor_rows: Vec<usize> = crate::floor::sample_rows(reference.rows).collect();

    let mut res = EngineResult {
        candidates: (0..nc)
            .map(|_| CandidateAccum {
                values: vec![Vec::new(); NMETRIC],
                estimators: vec![Default::default(); samples.len()],
                ..Default::default()
            })
            .collect(),
        ..Default::default()
    };
    for a in 0..nc {
        for b in a + 1..nc {
            res.pairs.push(PairAccum {
                a,
                b,
                prompts: Vec::new(),
            });
        }
    }

    let ctx = RowCtx {
        reference,
        candidates,
        targets,
        opts,
        draws,
        floor_rows: &floor_rows,
    };
    let blank = RowOut {
        counted: false,
        ref_fault: None,
        cands: vec![
            CandOut {
                fault: None,
                m: [0.0; NMETRIC],
                est: vec![[[0.0; 3]; 2]; samples.len()],
                floor: f64::NAN,
            };
            nc
        ],
    };
    let mut cur: Vec<RowOut> = vec![blank.clone(); block];
    let mut next: Vec<RowOut> = vec![blank; block];
    // One scratch per worker thread, taken by the worker's index, so nothing is
    // allocated per row or per task. The scratches are made, and each file's
    // way of reading its first rows chosen (`LogitFile::choose_reads`), on
    // the workers side by side before the pass, rather than the scratches
    // one after the other on the calling thread and each choice inside the
    // pass by whichever worker read the file first while the others waited
    // (one candidate on two threads, cached files: 1.3 to 1.8 ms against
    // 3.7 to 4.3 ms).
    let scratch: Vec<std::sync::Mutex<Scratch>> = {
        use rayon::prelude::*;
        let choose = || {
            if !range.is_empty() {
                files.par_iter().for_each(|f| f.choose_reads(range.start));
            }
        };
        let make = || {
            (0..rayon::current_num_threads().max(1))
                .into_par_iter()
                .map(|_| std::sync::Mutex::new(Scratch::new(cols, draws)))
                .collect()
        };
        rayon::join(choose, make).1
    };
    // Computes rows row0..row1 into `outs` in parallel. Reading ahead is
    // left to the kernel's sequential read-ahead (see
    // `LogitFile::advise_sequential`).
    let compute = |row0: usize, row1: usize, outs: &mut [RowOut]| {
        use rayon::prelude::*;
        // Each task takes a few consecutive rows, so a worker reads the
        // maps front to back; small tasks keep both workers busy to the
        // end of the block. `with_max_len(1)` lets every task be stolen:
        // rayon otherwise stops splitting after a few halvings, a worker
        // then runs a run of up to a quarter of the block's tasks on its
        // own, and the other, out of work, waited for it at the end of
        // most blocks (a `perf` timeline of one candidate on two threads:
        // 13 to 22 of 70 to 90 five-millisecond spans with one worker
        // idle, 4 to 7 with it; whole runs 1.045x, median of 20
        // alternating rounds).
        const TASK_ROWS: usize = 2;
        let run_task = |ti: usize, task: &mut [RowOut]| {
            let w = rayon::current_thread_index().unwrap_or(0) % scratch.len();
            let mut s = scratch[w].lock().unwrap_or_else(|e| e.into_inner());
            for (i, out) in task.iter_mut().enumerate() {
                let row = row0 + ti * TASK_ROWS + i;
                out.counted = counted(row, &files);
                if out.counted {
                    compute_row(&ctx, &mut s, row, out);
                }
            }
        };
        if drop_behind {
            // Rows that come from the disk are handed out in row order, so
            // each file is read as one stream. Split in halves, as rayon
            // does, the two workers read each file at two places at once
            // (`cold.py`, 6 rounds, per-round ratio to `cat`: three
            // candidates in a 256 MiB cgroup 1.05x against 1.08x, one in
            // 128 MiB 1.10x against 1.19x). Not for cached files: there the
            // halves let each worker's passes pull its own next row
            // (`Ahead`), and row order measured 0.961x on two threads.
            // `par_bridge` hands the tasks out one at a time, in order, to
            // whichever worker asks next.
            outs[..row1 - row0]
                .chunks_mut(TASK_ROWS)
                .enumerate()
                .par_bridge()
                .for_each(|(ti, task)| run_task(ti, task));
        } else {
            outs[..row1 - row0]
                .par_chunks_mut(TASK_ROWS)
                .with_max_len(1)
                .enumerate()
                .for_each(|(ti, task)| run_task(ti, task));
        }
        settle_block(&scratch, row0, outs);
    };
    // Where finished rows are dropped from the page cache, the worst
    // positions' top tokens are taken as a position enters a worst list,
    // while its rows are still cached: read after the pass, each would be
    // a read from the disk (three candidates within a 128 MiB memory
    // cgroup: 20 positions each took a run from 1.00 to 1.05 s, 200 to
    // 1.25 s). Elsewhere the rows are read again after the pass, which
    // costs less than taking the tokens of every row that enters a list on
    // its way (about K ln(N / K) rows for a list of K out of N).
    let mut tops_buf = TopBuf::default();
    let bar = progress_bar(opts.progress, range.len() as u64);
    let start = std::time::Instant::now();
    let mut row0 = range.start;
    let mut row1 = (row0 + block).min(range.end);
    if row0 < row1 {
        compute(row0, row1, &mut cur);
    }
    while row0 < range.end {
        let n = row1 - row0;
        let row2 = (row1 + block).min(range.end);
        // The next block is computed while this one is folded, in row order,
        // on the calling thread. `compare` calls from a worker of the pool
        // (`commands::compare::with_threads`): the fold takes that worker,
        // the others start the next block, and the folding worker joins
        // them once done. Called from outside the pool, the fold would be
        // one thread more than the pool has cores for.
        let folded: Result<()> = rayon::in_place_scope(|sc| {
            if row1 < row2 {
                let next = &mut next;
                let compute = &compute;
                sc.spawn(move |_| compute(row1, row2, next));
            }
            let res = &mut res;
            let tops_buf = &mut tops_buf;
            for (i, out) in cur[..n].iter().enumerate() {
                let row = row0 + i;
                if !out.counted {
                    continue;
                }
                let prompt = prompt_of[row] as usize;
                let position = row - reference.prompt_starts[prompt];
                let target = targets.map(|t| t[row]).filter(|&t| t >= 0);
                let mut ref_top = None;
                for (k, cand_file) in candidates.iter().enumerate() {
                    let acc = &mut res.candidates[k];
                    let fault = match (out.ref_fault, out.cands[k].fault) {
                        (Some(f), _) => Some(("reference", f)),
                        (None, Some(f)) => Some(("candidate", f)),
                        _ => None,
                    };
                    if let Some((file, f)) = fault {
                        acc.skipped_rows += 1;
                        if acc.skipped.len() < SKIPPED_LISTED {
                            acc.skipped.push(SkippedRow {
                                row: row as u64,
                                prompt: prompt as u64,
                                position: position as u64,
                                file: file.into(),
                                fault: f.describe().into(),
                            });
                        }
                        continue;
                    }
                    let co = &out.cands[k];
                    if let Some(left) = fold_position(acc, co, opts, row, prompt, position, target)
                    {
                        if let Some(r) = left {
                            acc.worst_tops.remove(&r);
                        }
                        if drop_behind {
                            let reference = ref_top
                                .get_or_insert_with(|| {
                                    top_tokens(reference, row, cols, TOP_TOKENS, tops_buf)
                                })
                                .clone();
                            let candidate = top_tokens(cand_file, row, cols, TOP_TOKENS, tops_buf);
                            let tops = RowTops {
                                reference,
                                candidate,
                            };
                            acc.worst_tops.insert(row as u64, tops);
                        }
                    }
                    sink.position(
                        k,
                        row,
                        prompt,
                        position,
                        target,
                        &PositionValues { m: co.m },
                    )?;
                }
                for pair in res.pairs.iter_mut() {
                    let (a, b) = (&out.cands[pair.a], &out.cands[pair.b]);
                    if out.ref_fault.is_some() || a.fault.is_some() || b.fault.is_some() {
                        continue;
                    }
                    let d = a.m[KL] - b.m[KL];
                    match pair.prompts.last_mut() {
                        Some(last) if last.0 == prompt as u64 => {
                            last.1 += 1.0;
                            last.2 += d;
                        }
                        _ => pair.prompts.push((prompt as u64, 1.0, d)),
                    }
                }
            }
            // This block's rows are finished: release them now, while the
            // next block is computed, not once it is done. Released after
            // the scope, two blocks' rows stayed mapped and (with drop
            // behind) cached at once: within a 256 MiB memory cgroup a
            // one-candidate run at 128k bf16 held the whole limit, against
            // under 200 MiB now (its time did not change measurably).
            for f in &files {
                f.release_before(row1);
            }
            Ok(())
        });
        folded?;
        res.rows_processed += n as u64;
        bar.inc(n as u64);
        std::mem::swap(&mut cur, &mut next);
        row0 = row1;
        row1 = row2;
    }
    bar.finish_and_clear();
    res.seconds = start.elapsed().as_secs_f64();
    for acc in res.candidates.iter_mut() {
        acc.worst.sort_by(worst_order);
        acc.kl_tail.finish();
    }
    Ok(res)
}

/// Highest kl first; ties to the lower row, so the list never depends on timing.
pub fn worst_order(a: &WorstPosition, b: &WorstPosition) -> std::cmp::Ordering {
    b.kl.total_cmp(&a.kl).then(a.row.cmp(&b.row))
}

/// Adds one counted position to a candidate's sums. Where it entered the
/// worst-position list, returns Some with the row that left the list to
/// make room for it, if one did.
fn fold_position(
    acc: &mut CandidateAccum,
    co: &CandOut,
    opts: &EngineOptions,
    row: usize,
    prompt: usize,
    position: usize,
    target: Option<i64>,
) -> Option<Option<u64>> {
    acc.positions += 1;
    let m = &co.m;
    let ps = match acc.prompts.last_mut() {
        Some(p) if p.prompt == prompt as u64 => p,
        _ => {
            acc.prompts.push(PromptSums::new(prompt as u64));
            acc.prompts.last_mut().unwrap()
        }
    };
    ps.n += 1.0;
    for (i, &v) in m.iter().enumerate() {
        if !v.is_nan() {
            ps.sum[i] += v;
            acc.values[i].push(v);
        }
    }
    if !m[NLL_REF].is_nan() {
        ps.n_target += 1.0;
    }
    ps.max_kl = ps.max_kl.max(m[KL]);
    if m[KL].is_infinite() {
        acc.infinite_kl += 1;
    }
    acc.kl_hist.add(m[KL]);
    acc.by_position.add(position as u64, m[KL], m[TOP1]);
    acc.kl_tail.add(prompt as u64, m[KL]);
    if co.floor.is_finite() {
        acc.floor_sum += co.floor;
        acc.floor_rows += 1;
    }
    for (b, e) in co.est.iter().enumerate() {
        acc.estimators[b][0].add(m[KL], &e[0]);
        acc.estimators[b][1].add(m[KL_REV], &e[1]);
    }
    // Keep the `top` worst positions (a small sorted list; top is small).
    let w = WorstPosition {
        row: row as u64,
        prompt: prompt as u64,
        position: position as u64,
        kl: m[KL],
        target,
    };
    if opts.top > 0 {
        let full = acc.worst.len() >= opts.top;
        if !full || worst_order(&w, acc.worst.last().unwrap()).is_lt() {
            let at = acc.worst.partition_point(|x| worst_order(x, &w).is_lt());
            acc.worst.insert(at, w);
            // It went in before the last, which leaves where the list was full.
            let left = if acc.worst.len() > opts.top {
                acc.worst.pop().map(|l| l.row)
            } else {
                None
            };
            return Some(left);
        }
    }
    None
}

fn progress_bar(enabled: bool, len: u64) -> indicatif::ProgressBar {
    if !enabled {
        return indicatif::ProgressBar::hidden();
    }
    // ProgressBar::new draws to stderr only when it is a terminal.
    let bar = indicatif::ProgressBar::new(len);
    if let Ok(style) =
        indicatif::ProgressStyle::with_template("{bar:40} {pos}/{len} rows  {per_sec}  eta {eta}")
    {
        bar.set_style(style);
    }
    bar
}

/// Reusable buffers of `top_tokens`: the row's bytes as read, decoded,
/// and its block sums. Each row used to be read into a fresh 256 KiB
/// buffer; a position whose buffers are new took 0.5 ms, one that reuses
/// them 0.12 ms (both models' rows, 128k bf16).
#[derive(Default)]
pub struct TopBuf {
    bytes: Vec<u8>,
    x: Vec<f32>,
    blocks: Vec<f64>,
}

/// The top tokens of a model at one row, for the worst-position list:
/// the `k` largest logits' columns and their probabilities.
pub fn top_tokens(
    file: &LogitFile,
    row: usize,
    cols: usize,
    k: usize,
    buf: &mut TopBuf,
) -> Vec<(u32, f64)> {
    let TopBuf { bytes, x, blocks } = buf;
    x.resize(cols, 0.0);
    blocks.resize(kernel::norm_blocks(cols), 0.0);
    file.read_row_via(row, x, bytes);
    match kernel::normalise(x, blocks) {
        Ok(n) => kernel::top_k(x, k)
            .into_iter()
            .map(|(i, v)| (i, (v as f64 - n.lse).exp()))
            .collect(),
        Err(_) => Vec::new(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Where finished rows are dropped from the page cache, the top tokens
    /// of every final worst position were taken during the pass, and they
    /// are what reading the rows again gives; elsewhere none are taken.
    #[test]
    fn worst_positions_take_their_tokens_before_their_rows_are_dropped() {
        let dir = std::env::temp_dir().join(format!("klgauge-worst-tops-{}", std::process::id()));
        let files = crate::demo::write_files(&dir).unwrap();
        let reference = LogitFile::open(&files.reference).unwrap();
        let candidates = vec![
            LogitFile::open(&files.int8).unwrap(),
            LogitFile::open(&files.int4).unwrap(),
        ];
        let aligned = align(&reference, &candidates, None).unwrap();
        let run_with = |drop_behind| {
            let opts = EngineOptions {
                top: 7,
                // Small blocks: positions enter and leave the lists across blocks.
                block_rows: 16,
                drop_behind: Some(drop_behind),
                ..EngineOptions::default()
            };
            run(
                &reference,
                &candidates,
                &aligned,
                &opts,
                &mut crate::report::csv::NoSink,
            )
            .unwrap()
        };
        let (taken, read) = (run_with(true), run_with(false));
        let mut buf = TopBuf::default();
        for (k, (acc, plain)) in taken.candidates.iter().zip(&read.candidates).enumerate() {
            assert_eq!(acc.worst, plain.worst);
            assert_eq!(acc.worst.len(), 7);
            assert!(plain.worst_tops.is_empty());
            // Exactly the rows of the final list: those that left it were let go.
            let mut rows: Vec<u64> = acc.worst_tops.keys().copied().collect();
            let mut want: Vec<u64> = acc.worst.iter().map(|w| w.row).collect();
            rows.sort_unstable();
            want.sort_unstable();
            assert_eq!(rows, want, "candidate {k}");
            for w in &acc.worst {
                let row = w.row as usize;
                let t = &acc.worst_tops[&w.row];
                let cols = aligned.cols;
                assert_eq!(
                    t.reference,
                    top_tokens(&reference, row, cols, TOP_TOKENS, &mut buf)
                );
                assert_eq!(
                    t.candidate,
                    top_tokens(&candidates[k], row, cols, TOP_TOKENS, &mut buf)
                );
                assert_eq!(t.reference.len(), TOP_TOKENS);
            }
        }
        let _ = std::fs::remove_dir_all(&dir);
    }

    /// Where the files stay cached the block is what was asked for; where
    /// they cannot, it holds at most a quarter of the room, and never fewer
    /// than 16 rows.
    #[test]
    fn blocks_shrink_to_a_quarter_of_the_cache_room() {
        // Three candidates and the reference at 128,256 bf16 columns.
        let row = 4 * 128_256 * 2;
        assert_eq!(block_rows(BLOCK_ROWS, row, None), BLOCK_ROWS);
        assert_eq!(block_rows(BLOCK_ROWS, row, Some(64 << 30)), BLOCK_ROWS);
        // 256 MiB / 4 = 64 MiB, 65 rows of 1,026,048 bytes.
        assert_eq!(block_rows(BLOCK_ROWS, row, Some(256 << 20)), 65);
        assert_eq!(block_rows(BLOCK_ROWS, row, Some(1 << 20)), 16);
        assert_eq!(block_rows(7, row, Some(256 << 20)), 7);
    }
}
