//! klgauge: exact next-token divergence between a reference language model
//! and compressed candidates, from dumped full-vocabulary logits.

pub mod error;
pub mod input;
pub mod kernel;
