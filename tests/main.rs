//! All integration tests, built as one binary: each module is one area.

mod support;

mod architecture;
mod cli;
mod demo;
mod deploy;
mod estimation;
mod family_memory;
mod fuzz;
mod http_api;
mod http_bomb;
mod http_calibrate;
mod http_core;
mod http_csv;
mod http_errors;
mod http_families;
mod http_hardening;
mod http_identify;
mod http_logs;
mod http_memory;
mod http_simulate;
mod http_time;
mod identify;
mod identify_memory;
mod no_alloc;
mod openapi;
mod page;
mod request_keys;
mod stream_no_alloc;
