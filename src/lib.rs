//! tacit recovers the states a plant's sensors do not measure.
//!
//! A request is parsed once ([`request`]: serde mirror types, then one validation step)
//! into the checked types of [`model`], its formulas compiled ([`formula`]); a filter
//! ([`filter`]) propagates the state between readings ([`dynamics`]) and updates it with
//! each partial reading, on the matrix kernels of [`linalg`]; [`diagnostics`] judges
//! consistency and observability; [`simulate`] makes truth and readings for tests and
//! demos; [`job`] turns request bytes into response bytes for the web layer ([`http`]) and
//! the command line ([`cli`]). `DEVELOPERS.md` at the top of the repository has the code
//! map from a request to a filter step.
//!
//! Imports point down: [`http`], [`cli`] → [`job`] → the estimation core ([`filter`],
//! [`diagnostics`], [`dynamics`], [`simulate`], [`identify`]) → [`formula`], [`request`],
//! [`model`], [`linalg`]. The web layer knows no filter, the estimation core knows no
//! request bytes, and [`problem`] is the one error shape the request side shares.
//!
//! # Example
//!
//! One estimate, without a server: a trolley read by position only, its speed recovered.
//!
//! ```
//! use tacit::config::Limits;
//! use tacit::job::Stop;
//!
//! let body = br#"{
//!   "model": {"states": ["position", "velocity"],
//!             "dynamics": {"rates": {"position": "velocity"}},
//!             "process_noise": {"density": {"velocity": 0.0004}},
//!             "sensors": {"encoder": {"measures": "position", "std": 0.002}}},
//!   "filter": {"method": "ekf"},
//!   "prior": {"t": 0.0, "mean": {"position": 2.0, "velocity": 0.0},
//!             "std": {"position": 0.01, "velocity": 1.0}},
//!   "measurements": [{"t": 0.1, "values": {"encoder": 2.05}},
//!                    {"t": 0.2, "values": {"encoder": 2.10}},
//!                    {"t": 0.3, "values": {"encoder": 2.15}}]
//! }"#;
//! let done = tacit::job::estimate(body, &Limits::default(), &Stop::never())
//!     .expect("a valid request");
//! let answer: serde_json::Value = serde_json::from_slice(&done.body).unwrap();
//! let speed = answer["posterior"]["mean"]["velocity"].as_f64().unwrap();
//! // The readings move 0.05 m every 0.1 s: the unmeasured speed is near 0.5 m/s.
//! assert!((speed - 0.5).abs() < 0.1, "speed {speed}");
//! assert_eq!(answer["estimates"].as_array().unwrap().len(), 3);
//! ```
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
pub mod identify;
pub mod job;
pub mod linalg;
pub mod model;
pub mod problem;
pub mod request;
pub mod simulate;
