//! A log-probability file (SPEC, `klgauge estimate`): for when full logits
//! were never kept, only the log-probabilities that both models gave to
//! tokens drawn from the reference.
//!
//! | tensor | required | dtype | shape | meaning |
//! |---|---|---|---|---|
//! | `logprob_ref` | yes | F32 | `[n]` | log p(x_i) of the reference at draw i, x_i ~ p |
//! | `logprob_cand` | yes | F32 | `[n]` | log q(x_i) of the candidate at the same token |
//! | `prompt_offsets` | no | I64 | `[prompts + 1]` | first draw of each prompt, from 0 to `n` |
//! | `tokens` | no | I64 | `[n]` | the drawn token ids (informational, not read) |
//!
//! The header is validated as strictly as a logit file's (the same
//! `MappedFile`), and so are shapes, dtypes and offsets. Values are checked
//! too: a log-probability above 0 (beyond rounding) means something else was
//! stored, which is an input error; a NaN or +inf, or a reference value of
//! -inf (a token the reference cannot have drawn), makes that one draw a
//! fault, skipped, counted and listed like a faulty logit row. A candidate
//! value of -inf is legitimate: the candidate rules the token out and
//! KL(p||q) is infinite.

use super::file::MappedFile;
use super::logits::Grouping;
use crate::error::{Error, Result};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// Largest log-probability accepted as rounding of 0 (log-softmax in f32 of a
/// near-certain token can come out a few ulp above 0).
pub const POSITIVE_TOLERANCE: f32 = 1e-3;

/// Why one draw cannot be used.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DrawFault {
    Nan,
    PosInf,
    /// The reference gives the token probability 0: it was not drawn from it.
    RefNegInf,
}

impl DrawFault {
    pub fn describe(self) -> &'static str {
        match self {
            DrawFault::Nan => "NaN log-probability",
            DrawFault::PosInf => "+inf log-probability",
            DrawFault::RefNegInf => {
                "logprob_ref is -inf: the reference cannot have drawn this token"
            }
        }
    }
}

#[derive(Debug)]
pub struct LogprobFile {
    pub path: PathBuf,
    /// Number of draws.
    pub n: usize,
    pub logprob_ref: Vec<f32>,
    pub logprob_cand: Vec<f32>,
    /// `Offsets` or `PerRow` (each draw its own prompt).
    pub grouping: Grouping,
    /// Prompt start draws, `prompts + 1` entries, first 0 and last `n`.
    pub prompt_starts: Vec<usize>,
    pub metadata: BTreeMap<String, String>,
}

impl LogprobFile {
    pub fn open(path: &Path) -> Result<LogprobFile> {
        let file = MappedFile::open(path)?;
        Self::from_mapped(&file)
    }

    /// Validates an already mapped file.
    pub fn from_mapped(file: &MappedFile) -> Result<LogprobFile> {
        let path = &file.path;
        let err = |m: String| Error::input(path, m);
        let found = || {
            if file.tensors.is_empty() {
                "no tensors".to_string()
            } else {
                file.tensors
                    .keys()
                    .map(|k| format!("`{k}`"))
                    .collect::<Vec<_>>()
                    .join(", ")
            }
        };
        let get = |name: &str| -> Result<Vec<f32>> {
            let t = match file.tensors.get(name) {
                Some(t) => t,
                None if file.tensors.contains_key("logits") => {
                    return Err(err(format!(
                        "no `{name}` tensor: this file holds full logits (`logits`); compare two such files with `klgauge compare`"
                    )))
                }
                None => return Err(err(format!("no `{name}` tensor (found: {})", found()))),
            };
            if t.shape.len() != 1 {
                return Err(err(format!(
                    "`{name}` has shape {:?}, expected [n] (one value per draw)",
                    t.shape
                )));
            }
            if t.shape[0] == 0 {
                return Err(err(format!("`{name}` is empty: there are no draws")));
            }
            file.read_f32(name, t)
        };
        let lp = get("logprob_ref")?;
        let lq = get("logprob_cand")?;
        if lp.len() != lq.len() {
            return Err(err(format!("`logprob_cand` has {} values, `logprob_ref` has {}: they must pair up draw by draw", lq.len(), lp.len())));
        }
        let n = lp.len();
        for (name, v) in [("logprob_ref", &lp), ("logprob_cand", &lq)] {
            if let Some(i) = v
                .iter()
                .position(|&x| x.is_finite() && x > POSITIVE_TOLERANCE)
            {
                return Err(err(format!(
                    "`{name}`[{i}] = {} is positive: a log-probability is at most 0 (were raw logits stored instead of log-softmax values?)",
                    v[i]
                )));
            }
        }
        let (grouping, prompt_starts) = match file.tensors.get("prompt_offsets") {
            Some(t) => {
                let o = file.read_prompt_offsets(t, n, "the number of draws")?;
                (Grouping::Offsets, o.iter().map(|&x| x as usize).collect())
            }
            None => (Grouping::PerRow, (0..=n).collect()),
        };
        Ok(LogprobFile {
            path: path.clone(),
            n,
            logprob_ref: lp,
            logprob_cand: lq,
            grouping,
            prompt_starts,
            metadata: file.metadata.clone(),
        })
    }

    pub fn prompts(&self) -> usize {
        self.prompt_starts.len() - 1
    }

    /// log r = log q(x) - log p(x) of draw `i`, or why it cannot be used.
    pub fn log_ratio(&self, i: usize) -> std::result::Result<f64, DrawFault> {
        let (a, b) = (self.logprob_ref[i], self.logprob_cand[i]);
        for v in [a, b] {
            if v.is_nan() {
                return Err(DrawFault::Nan);
            }
            if v == f32::INFINITY {
                return Err(DrawFault::PosInf);
            }
        }
        if a == f32::NEG_INFINITY {
            return Err(DrawFault::RefNegInf);
        }
        Ok(b as f64 - a as f64)
    }
}
