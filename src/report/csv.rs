//! `--csv`: one line per counted position, streamed while the engine runs.
//!
//! The columns are SPEC's. With several candidates a leading `candidate`
//! column (0-based, in command-line order) keeps them in one file.

use crate::engine::{
    PositionSink, PositionValues, ENT_CAND, ENT_REF, JS, KL, KL_REV, NLL_CAND, NLL_REF, TOP1, TV,
};
use crate::error::Result;
use crate::output::AtomicFile;
use std::io::Write;

pub const HEADER: &str = "row,prompt,position,target,kl,kl_reverse,tv,top1_agree,entropy_ref,entropy_cand,nll_ref,nll_cand";

pub struct CsvSink {
    file: AtomicFile,
    multi: bool,
    js: bool,
    scale: f64,
    line: String,
}

impl CsvSink {
    pub fn create(
        path: &std::path::Path,
        candidates: usize,
        js: bool,
        bits: bool,
    ) -> Result<CsvSink> {
        let mut file = AtomicFile::create(path)?;
        let multi = candidates > 1;
        let mut h = String::new();
        if multi {
            h.push_str("candidate,");
        }
        h.push_str(HEADER);
        if js {
            h.push_str(",js");
        }
        h.push('\n');
        file.writer()
            .write_all(h.as_bytes())
            .map_err(|e| file.write_err(e))?;
        let scale = if bits {
            1.0 / std::f64::consts::LN_2
        } else {
            1.0
        };
        Ok(CsvSink {
            file,
            multi,
            js,
            scale,
            line: String::with_capacity(256),
        })
    }

    pub fn finish(self) -> Result<()> {
        self.file.commit()
    }
}

/// Shortest text that reads back to the same f64; `inf` for infinity and an
/// empty field where the value does not exist.
fn num(s: &mut String, v: f64) {
    use std::fmt::Write;
    if v.is_nan() {
    } else if v == f64::INFINITY {
        s.push_str("inf");
    } else if v == f64::NEG_INFINITY {
        s.push_str("-inf");
    } else {
        let _ = write!(s, "{v:e}");
    }
}

impl PositionSink for CsvSink {
    fn position(
        &mut self,
        cand: usize,
        row: usize,
        prompt: usize,
        position: usize,
        target: Option<i64>,
        v: &PositionValues,
    ) -> Result<()> {
        use std::fmt::Write as _;
        let s = &mut self.line;
        s.clear();
        if self.multi {
            let _ = write!(s, "{cand},");
        }
        let _ = write!(s, "{row},{prompt},{position},");
        if let Some(t) = target {
            let _ = write!(s, "{t}");
        }
        let m = &v.m;
        for (i, scaled) in [
            (KL, true),
            (KL_REV, true),
            (TV, false),
            (TOP1, false),
            (ENT_REF, true),
            (ENT_CAND, true),
            (NLL_REF, true),
            (NLL_CAND, true),
        ] {
            s.push(',');
            if i == TOP1 {
                let _ = write!(s, "{}", m[i] as u8);
            } else {
                num(s, if scaled { m[i] * self.scale } else { m[i] });
            }
        }
        if self.js {
            s.push(',');
            num(s, m[JS] * self.scale);
        }
        s.push('\n');
        let line = std::mem::take(&mut self.line);
        let r = self
            .file
            .writer()
            .write_all(line.as_bytes())
            .map_err(|e| self.file.write_err(e));
        self.line = line;
        r
    }
}

/// A sink that drops everything (no --csv).
pub struct NoSink;

impl PositionSink for NoSink {
    fn position(
        &mut self,
        _: usize,
        _: usize,
        _: usize,
        _: usize,
        _: Option<i64>,
        _: &PositionValues,
    ) -> Result<()> {
        Ok(())
    }
}
