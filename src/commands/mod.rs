//! The work behind each subcommand, callable from the library. The binary
//! only parses arguments, calls these and prints.

pub mod compare;
pub mod estimate;
pub mod inspect;
pub mod merge;
