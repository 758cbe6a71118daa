//! `--json`: the report model as JSON (SPEC, "Report JSON").
//!
//! serde_json writes non-finite numbers as `null`; an infinite kl shows up as
//! a null mean next to a non-zero `infinite_kl` count, and a warning.

use super::{Format, Report};
use std::io::Write;

pub struct Json;

impl Format for Json {
    fn write(&self, report: &Report, out: &mut dyn Write) -> std::io::Result<()> {
        serde_json::to_writer_pretty(&mut *out, report)?;
        out.write_all(b"\n")
    }
}
