//! Reading and validating input files. Nothing outside this module touches
//! raw bytes of a safetensors file.

pub mod file;
pub mod logits;
pub mod logprobs;
pub mod room;

pub use logits::{Grouping, LogitFile, StoredDtype};
pub use logprobs::LogprobFile;
