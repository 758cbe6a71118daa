//! klgauge: exact next-token divergence between a reference language model
//! and compressed candidates, from dumped full-vocabulary logits.

pub mod commands;
pub mod demo;
pub mod engine;
pub mod error;
pub mod estimators;
pub mod floor;
pub mod histo;
pub mod input;
pub mod kernel;
pub mod output;
pub mod partial;
pub mod report;
pub mod sketch;
pub mod stats;
pub mod tokens;
