//! Requests: JSON in, checked types out. Parsing happens in two stages: the request
//! envelope (`envelope`) and serde mirror types of each section (`raw`), then one
//! validation step (`validate`) producing the checked [`crate::model`] types that the
//! filters consume, with typed errors (`error`). Measurement lines have their own reader
//! (`reading`), with a byte cursor for the usual line (`line_scan`). A historian CSV upload
//! becomes measurement-line text in `csv`.

pub mod csv;
pub mod envelope;
pub mod error;
pub(crate) mod line_scan;
pub mod raw;
pub mod reader;
pub mod reading;
pub mod validate;
