//! klgauge: exact next-token divergence between a reference language model
//! and compressed candidates, from dumped full-vocabulary logits.

pub mod error;
pub mod input;
pub mod kernel;
pub mod engine;
pub mod estimators;
pub mod stats;
pub mod histo;
pub mod sketch;
pub mod partial;
pub mod floor;
pub mod output;
pub mod report;
pub mod tokens;
pub mod commands;
pub mod demo;
