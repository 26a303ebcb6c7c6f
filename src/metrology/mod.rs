//! The arithmetic behind a verdict: statistics of the samples, errors against the reference and
//! the comparison with the tolerance.
//!
//! Everything here is pure: numbers in, numbers out, no I/O, so that each formula is tested
//! against its published source beside the code.

pub mod accuracy;
pub mod calibration;
pub mod capability;
pub mod classes;
pub mod compare;
pub mod decision;
pub mod fit;
pub mod pulses;
pub mod risk;
pub mod stats;
pub mod tolerance;
pub mod uncertainty;

pub use stats::Summary;
pub use tolerance::{Evaluation, evaluate};
