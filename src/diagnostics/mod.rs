//! Consistency and structure diagnostics: chi-square quantiles for gates and NIS bounds,
//! the run summary's NIS verdict, the warnings a run raises, and observability of the
//! linearised model.

pub mod chi2;
pub mod nis;
pub mod observability;
pub mod warnings;
