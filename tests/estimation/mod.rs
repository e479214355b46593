//! The estimation core checked against sources outside the project (docs/references.md
//! R1–R10), plus resumption, properties and request validation. These call the same job
//! functions the server does, so the whole path from JSON in to JSON out is exercised.

mod affine_sensor;
mod bounds;
mod calibrate;
mod edges;
mod errors;
mod properties;
mod r10_integration;
mod r11_nile;
mod r15_long_gaps;
mod r2_alpha_beta;
mod r3_riccati;
mod r4_unscented_linear;
mod r5_smoother;
mod r6_consistency;
mod r7_r8_ensemble;
mod r9_parameter;
mod resume;
mod support;
mod trust;
