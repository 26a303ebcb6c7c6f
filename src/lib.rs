//! meterproof: acceptance tests for the production of electricity meters, current monitors and
//! smart plugs.
//!
//! Data flows one way: a [`plan`] is run by the [`exec`] engine on a [`bench`] (whose units are
//! reached through a [`link`]), which yields one [`record`] per unit; [`report`] renders records.
//! The [`metrology`] module holds the arithmetic, free of I/O. [`cli`] is the only place that
//! prints errors or chooses exit codes.

pub mod archive;
pub mod bench;
pub mod cli;
pub mod exec;
pub mod link;
pub mod metrology;
pub mod plan;
pub mod record;
pub mod regression;
pub mod report;

/// The version recorded in every unit record.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");
