//! `klgauge compare REF CAND [CAND ...]`.

use crate::engine::{self, EngineOptions};
use crate::error::{Error, Result};
use crate::input::LogitFile;
use crate::output::write_atomic;
use crate::report::{self, csv::CsvSink, csv::NoSink, BuildInputs, Format, GateLimits, Report};
use std::path::PathBuf;

#[derive(Debug, Clone)]
pub struct CompareArgs {
    pub reference: PathBuf,
    pub candidates: Vec<PathBuf>,
    pub json: Option<PathBuf>,
    pub csv: Option<PathBuf>,
    pub html: Option<PathBuf>,
    pub top: usize,
    pub tokenizer: Option<PathBuf>,
    pub samples: Vec<usize>,
    pub seed: u64,
    pub threads: Option<usize>,
    pub vocab: Option<usize>,
    pub js: bool,
    pub bits: bool,
    pub shard: Option<(usize, usize)>,
    pub partial: Option<PathBuf>,
    pub gates: GateLimits,
    pub progress: bool,
}

impl Default for CompareArgs {
    fn default() -> Self {
        CompareArgs {
            reference: PathBuf::new(),
            candidates: Vec::new(),
            json: None,
            csv: None,
            html: None,
            top: 20,
            tokenizer: None,
            samples: vec![1, 4, 16],
            seed: 0,
            threads: None,
            vocab: None,
            js: false,
            bits: false,
            shard: None,
            partial: None,
            gates: GateLimits::default(),
            progress: false,
        }
    }
}

pub struct Outcome {
    pub report: Report,
    /// Some gate failed: exit code 1.
    pub gate_failed: bool,
}

/// Runs `f` on one of the workers of a pool of `threads` (or of rayon's
/// default pool, one per core), so that a run, its report included, uses
/// that many threads and no more. On the calling thread, outside the pool,
/// `f` would be a third thread beside two workers on two cores: the engine
/// folds each block on the thread that called it while the workers compute
/// the next, and that fold would take turns with a worker (see
/// DEVELOPERS.md, "Engine"). On a worker the fold takes that worker's time,
/// and the worker then joins the others.
pub fn with_threads<T: Send>(threads: Option<usize>, f: impl FnOnce() -> T + Send) -> Result<T> {
    match threads {
        Some(0) => Err(Error::usage("--threads must be at least 1")),
        Some(n) => {
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(n)
                .build()
                .map_err(|e| Error::usage(format!("cannot start {n} threads: {e}")))?;
            Ok(pool.install(f))
        }
        // `scope` called from outside the pool runs its closure on a worker.
        None => Ok(rayon::scope(|_| f())),
    }
}

pub fn compare(args: &CompareArgs) -> Result<Outcome> {
    if args.shard.is_some() || args.partial.is_some() {
        return Err(Error::usage(
            "--shard and --partial write a partial result: use `compare_shard`",
        ));
    }
    // Open and validate everything before any computation or output.
    let (reference, candidates) = open_inputs(args)?;
    let aligned = engine::align(&reference, &candidates, args.vocab)?;
    let (cols, targets) = (aligned.cols, aligned.targets);
    let vocabulary = match &args.tokenizer {
        Some(p) => Some(crate::tokens::Vocabulary::load(p)?),
        None => None,
    };
    let opts = engine_options(args, None);
    let samples = engine::budgets(&args.samples);

    let inputs = BuildInputs {
        reference: &reference,
        candidates: &candidates,
        cols,
        bits: args.bits,
        samples,
        seed: args.seed,
        top: args.top,
        js: args.js,
        shard: None,
        gates: args.gates.clone(),
        vocabulary: vocabulary.as_ref(),
        targets,
    };
    // The report reads the worst positions' rows again, on the same pool.
    let report = with_threads(args.threads, || -> Result<Report> {
        let result = run_engine(args, &reference, &candidates, &aligned, &opts)?;
        Ok(report::build(&inputs, result))
    })??;
    write_reports(&report, args.json.as_ref(), args.html.as_ref())?;
    let gate_failed = report
        .candidates
        .iter()
        .any(|c| c.gates.iter().any(|g| !g.pass));
    Ok(Outcome {
        report,
        gate_failed,
    })
}

/// Opens and validates the reference and every candidate, before any
/// computation or output.
fn open_inputs(args: &CompareArgs) -> Result<(LogitFile, Vec<LogitFile>)> {
    if args.candidates.is_empty() {
        return Err(Error::usage(
            "compare needs a reference and at least one candidate",
        ));
    }
    let reference = LogitFile::open(&args.reference)?;
    let candidates = args
        .candidates
        .iter()
        .map(|p| LogitFile::open(p))
        .collect::<Result<Vec<_>>>()?;
    Ok((reference, candidates))
}

fn engine_options(args: &CompareArgs, rows: Option<std::ops::Range<usize>>) -> EngineOptions {
    EngineOptions {
        js: args.js,
        samples: args.samples.clone(),
        seed: args.seed,
        top: args.top,
        rows,
        block_rows: crate::engine::BLOCK_ROWS,
        progress: args.progress,
        drop_behind: None,
    }
}

/// Runs the engine, streaming `--csv` if asked (inside `with_threads`).
fn run_engine(
    args: &CompareArgs,
    reference: &LogitFile,
    candidates: &[LogitFile],
    aligned: &engine::Alignment,
    opts: &EngineOptions,
) -> Result<engine::EngineResult> {
    match &args.csv {
        Some(p) => {
            let mut sink = CsvSink::create(p, candidates.len(), args.js, args.bits)?;
            let r = engine::run(reference, candidates, aligned, opts, &mut sink)?;
            sink.finish()?;
            Ok(r)
        }
        None => engine::run(reference, candidates, aligned, opts, &mut NoSink),
    }
}

/// Writes the file reports that were asked for, each atomically.
pub fn write_reports(
    report: &Report,
    json: Option<&PathBuf>,
    html: Option<&PathBuf>,
) -> Result<()> {
    if let Some(p) = json {
        write_atomic(p, |w| report::json::Json.write(report, w))?;
    }
    if let Some(p) = html {
        write_atomic(p, |w| report::html::Html.write(report, w))?;
    }
    Ok(())
}

/// What a shard run did, for its terminal summary.
pub struct ShardOutcome {
    pub partial: PathBuf,
    pub index: usize,
    pub count: usize,
    pub prompts: std::ops::Range<usize>,
    pub rows: std::ops::Range<usize>,
    pub total_prompts: usize,
    pub total_rows: usize,
    /// Per candidate: (counted positions, skipped rows).
    pub counted: Vec<(u64, u64)>,
}

impl ShardOutcome {
    pub fn summary(&self) -> String {
        let mut s = format!(
            "shard {}/{}: prompts {}..{} of {}, rows {}..{} of {}\n",
            self.index,
            self.count,
            self.prompts.start,
            self.prompts.end,
            self.total_prompts,
            self.rows.start,
            self.rows.end,
            self.total_rows
        );
        for (k, (n, skipped)) in self.counted.iter().enumerate() {
            s.push_str(&format!(
                "  candidate {}: {n} positions counted, {skipped} rows skipped\n",
                k + 1
            ));
        }
        s.push_str(&format!(
            "partial result written to {}; combine all {} with `klgauge merge`\n",
            self.partial.display(),
            self.count
        ));
        s
    }
}

/// `compare --shard I/N --partial FILE`: the rows of one shard, written as a
/// partial result for `merge`. Without `--shard` the whole input is shard 0/1.
pub fn compare_shard(args: &CompareArgs) -> Result<ShardOutcome> {
    let partial_path = args.partial.clone().ok_or_else(|| {
        Error::usage("--shard needs --partial FILE, where the shard writes its partial result")
    })?;
    let (index, count) = args.shard.unwrap_or((0, 1));
    if count == 0 || index >= count {
        return Err(Error::usage(format!(
            "--shard {index}/{count}: expected I/N with 0 <= I < N"
        )));
    }
    if args.json.is_some() || args.html.is_some() {
        return Err(Error::usage("a shard run writes only its partial result (--partial); make the JSON and HTML reports with `klgauge merge`"));
    }
    let g = &args.gates;
    if g.max_kl_mean.is_some() || g.max_kl_p99.is_some() || g.min_top1.is_some() {
        return Err(Error::usage("gates judge the whole run: give --max-kl-mean, --max-kl-p99 and --min-top1 to `klgauge merge`, not to a shard"));
    }
    let (reference, candidates) = open_inputs(args)?;
    let aligned = engine::align(&reference, &candidates, args.vocab)?;
    let (cols, targets) = (aligned.cols, aligned.targets);
    let (prompts, rows) = crate::partial::shard_range(&reference, index, count);
    let samples = engine::budgets(&args.samples);
    let opts = engine_options(args, Some(rows.clone()));
    // The partial's worst positions read their rows again, on the same pool.
    let (partial, counted) = with_threads(args.threads, || -> Result<_> {
        let result = run_engine(args, &reference, &candidates, &aligned, &opts)?;
        let counted = result
            .candidates
            .iter()
            .map(|c| (c.positions, c.skipped_rows))
            .collect();
        let run = crate::partial::ShardRun {
            reference: &reference,
            candidates: &candidates,
            cols,
            targets,
            settings: crate::partial::SettingsRecord {
                compared_vocab: cols as u64,
                vocab: args.vocab.map(|v| v as u64),
                samples,
                seed: args.seed,
                top: args.top,
                js: args.js,
                bits: args.bits,
                sketch_relative_accuracy: crate::sketch::DEFAULT_RELATIVE_ACCURACY,
            },
            index,
            count,
        };
        Ok((crate::partial::from_run(&run, result), counted))
    })??;
    crate::partial::write(&partial, &partial_path)?;
    Ok(ShardOutcome {
        partial: partial_path,
        index,
        count,
        prompts,
        rows,
        total_prompts: reference.prompts(),
        total_rows: reference.rows,
        counted,
    })
}

#[cfg(test)]
mod tests {
    use super::with_threads;

    /// A run, its report included, takes place on a worker of a pool of the
    /// size asked for; by default on one of rayon's own pool, not beside it.
    #[test]
    fn a_run_takes_place_on_a_worker_of_its_pool() {
        for n in [1, 3] {
            let (on_worker, size) = with_threads(Some(n), || {
                (
                    rayon::current_thread_index().is_some(),
                    rayon::current_num_threads(),
                )
            })
            .unwrap();
            assert!(on_worker, "--threads {n}: the run is not on a worker");
            assert_eq!(size, n);
        }
        let (on_worker, size) = with_threads(None, || {
            (
                rayon::current_thread_index().is_some(),
                rayon::current_num_threads(),
            )
        })
        .unwrap();
        assert!(on_worker, "default: the run is not on a worker");
        assert_eq!(size, rayon::current_num_threads());
        assert!(with_threads(Some(0), || ()).is_err());
    }
}
