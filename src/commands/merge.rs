//! `klgauge merge PARTIAL ...`: the report of a sharded run, from the partial
//! results its shards wrote (see `crate::partial`).

use super::compare::{write_reports, Outcome};
use crate::error::{Error, Result};
use crate::partial;
use crate::report::GateLimits;
use std::path::PathBuf;

#[derive(Debug, Clone, Default)]
pub struct MergeArgs {
    pub partials: Vec<PathBuf>,
    pub json: Option<PathBuf>,
    pub html: Option<PathBuf>,
    /// Worst positions and prompts listed; None = what the shards kept.
    pub top: Option<usize>,
    pub tokenizer: Option<PathBuf>,
    pub bits: bool,
    pub gates: GateLimits,
}

pub fn merge(args: &MergeArgs) -> Result<Outcome> {
    if args.partials.is_empty() {
        return Err(Error::usage(
            "merge needs the partial results of every shard",
        ));
    }
    // Read and check everything before any output.
    let parts = args
        .partials
        .iter()
        .map(|p| Ok((p.clone(), partial::read(p)?)))
        .collect::<Result<Vec<_>>>()?;
    let merged = partial::merge(parts)?;
    let kept = merged.settings.top;
    let top = args.top.unwrap_or(kept);
    if top > kept {
        return Err(Error::usage(format!(
            "--top {top}: the shards kept only their {kept} worst positions each; rerun them with --top {top} or ask for at most {kept}"
        )));
    }
    let vocabulary = match &args.tokenizer {
        Some(p) => Some(crate::tokens::Vocabulary::load(p)?),
        None => None,
    };
    let report = partial::report(
        &merged,
        top,
        args.bits,
        args.gates.clone(),
        vocabulary.as_ref(),
    );
    // HTML first: if that format is refused, no JSON is left behind either.
    write_reports(&report, None, args.html.as_ref())?;
    write_reports(&report, args.json.as_ref(), None)?;
    let gate_failed = report
        .candidates
        .iter()
        .any(|c| c.gates.iter().any(|g| !g.pass));
    Ok(Outcome {
        report,
        gate_failed,
    })
}
