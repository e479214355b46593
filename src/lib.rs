//! tacit recovers the states a plant's sensors do not measure.
//!
//! A request is parsed once into a checked model ([`spec`]), its formulas compiled
//! ([`formula`]); a filter ([`filter`]) propagates the state between readings
//! ([`dynamics`]) and updates it with each partial reading; [`diagnostics`] judges
//! consistency and observability; [`simulate`] makes truth and readings for tests and demos;
//! [`job`] turns request bytes into response bytes for the web layer and the CLI.
//!
//! Imports point down: [`http`] → [`job`] → the estimation core ([`filter`],
//! [`diagnostics`], [`dynamics`], [`simulate`]) → [`formula`], [`spec`]. The web layer
//! knows no filter, the estimation core knows no request, and [`problem`] is the one error
//! shape the request side shares.
//!
//! Estimates are advisory: validate them before any use in a safety function, and defer to
//! local codes and licensed practice.

pub mod cli;
pub mod config;
pub mod demo;
pub mod diagnostics;
pub mod dynamics;
pub mod filter;
pub mod formula;
pub mod http;
pub mod job;
pub mod linalg;
pub mod problem;
pub mod simulate;
pub mod spec;
