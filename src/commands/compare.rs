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

/// Runs `f` on a pool of `threads` workers (or rayon's default).
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
        None => Ok(f()),
    }
}

pub fn compare(args: &CompareArgs) -> Result<Outcome> {
    if args.candidates.is_empty() {
        return Err(Error::usage("compare needs a reference and at least one candidate"));
    }
    if args.shard.is_some() || args.partial.is_some() {
        return Err(Error::usage("--shard and --partial are not available in this build"));
    }
    // Open and validate everything before any computation or output.
    let reference = LogitFile::open(&args.reference)?;
    let candidates = args.candidates.iter().map(|p| LogitFile::open(p)).collect::<Result<Vec<_>>>()?;
    let cols = engine::compared_columns(&reference, &candidates, args.vocab)?;
    let targets = engine::check_alignment(&reference, &candidates, cols)?;
    let vocabulary = match &args.tokenizer {
        Some(p) => Some(crate::tokens::Vocabulary::load(p)?),
        None => None,
    };
    let opts = EngineOptions {
        vocab: args.vocab,
        js: args.js,
        samples: args.samples.clone(),
        seed: args.seed,
        top: args.top,
        rows: None,
        block_rows: 64,
        progress: args.progress,
    };
    let mut samples = args.samples.clone();
    samples.sort_unstable();
    samples.dedup();
    samples.retain(|&n| n > 0);

    let result = with_threads(args.threads, || -> Result<engine::EngineResult> {
        match &args.csv {
            Some(p) => {
                let mut sink = CsvSink::create(p, candidates.len(), args.js, args.bits)?;
                let r = engine::run(&reference, &candidates, &opts, &mut sink)?;
                sink.finish()?;
                Ok(r)
            }
            None => engine::run(&reference, &candidates, &opts, &mut NoSink),
        }
    })??;
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
    let report = report::build(&inputs, result);
    write_reports(&report, args.json.as_ref(), args.html.as_ref())?;
    let gate_failed = report.candidates.iter().any(|c| c.gates.iter().any(|g| !g.pass));
    Ok(Outcome { report, gate_failed })
}

/// Writes the file reports that were asked for, each atomically.
pub fn write_reports(report: &Report, json: Option<&PathBuf>, html: Option<&PathBuf>) -> Result<()> {
    if let Some(p) = json {
        write_atomic(p, |w| report::json::Json.write(report, w))?;
    }
    if let Some(_p) = html {
        return Err(Error::usage("--html is not available in this build"));
    }
    Ok(())
}
