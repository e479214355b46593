//! tacit recovers the states a plant's sensors do not measure.
//!
//! A request is parsed once into a checked model ([`spec`]), its formulas compiled
//! ([`formula`]); a filter ([`filter`]) propagates the state between readings
//! ([`dynamics`]) and updates it with each partial reading; [`job`] turns request bytes
//! into response bytes, and [`http`] serves them.

pub mod cli;
pub mod config;
pub mod dynamics;
pub mod formula;
pub mod http;
pub mod job;
pub mod problem;
